package tallyward

import (
	"math/rand/v2"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/stretchr/testify/require"
)

// Automatic commits are written in the background while processing goes
// on. With commits every few hundred events and a cache that evicts
// records still being written, rows, final records and counters must
// equal a run with no automatic commit at all; and a crash image taken at
// random points (commits in flight included) must resume to the same
// result. The reference is the uninterrupted run of the crash tests.
func TestCommitsInFlightChangeNothing(t *testing.T) {
	evs := genLogins(13, 20_000, 2_000, 700, 3*time.Second)
	wantRows, wantRecords, wantStats := reference(t, evs)

	rows := newRowLog()
	opts := crashOpts()
	opts.CommitEvery = 250
	p := openTest(t, richSpec(rows.add), opts)
	for _, e := range evs {
		if err := p.Process(e); err != nil {
			require.True(t, benign(err), err)
		}
	}
	require.NoError(t, p.Flush())
	require.NoError(t, p.Commit(nil))
	require.Equal(t, wantRows, rows.rows)
	require.Equal(t, wantRecords, dumpRecords(t, p.store.DB()))
	got := p.Stats()
	require.Equal(t, wantStats.Applied, got.Applied)
	require.Equal(t, wantStats.LiveEntities, got.LiveEntities)
	require.Greater(t, got.Commits, uint64(len(evs)/250-2))

	r := rand.New(rand.NewPCG(13, 13))
	fs := vfs.NewCrashableMem()
	opts.FS, opts.Dir = fs, "db"
	all := map[uint64]string{}
	for crashes := 0; ; crashes++ {
		rows := newRowLog()
		p, err := Open(richSpec(rows.add), opts)
		require.NoError(t, err)
		start := p.ResumeSeq()
		stop := uint64(len(evs))
		if crashes < 4 {
			stop = start + uint64(r.IntN(len(evs)-int(start)+1))
		}
		for i := start; i < stop; i++ {
			if err := p.Process(evs[i]); err != nil {
				require.True(t, benign(err), err)
			}
		}
		if stop == uint64(len(evs)) {
			require.NoError(t, p.Flush())
			require.NoError(t, p.Commit(nil))
			mergeRows(t, all, rows.rows)
			require.Equal(t, wantRecords, dumpRecords(t, p.store.DB()))
			require.NoError(t, p.Close())
			break
		}
		// The image is taken with the last automatic commit possibly
		// still being written.
		clone := fs.CrashClone(vfs.CrashCloneCfg{UnsyncedDataPercent: r.IntN(100), RNG: rand.New(rand.NewPCG(13, uint64(crashes)))})
		mergeRows(t, all, rows.rows)
		abandonCrashed(p)
		fs = clone
		opts.FS = fs
	}
	require.Equal(t, wantRows, all)
}
