package tallyward

import (
	"errors"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/stretchr/testify/require"
)

// TestCommitHook: the hook runs in every commit (automatic ones
// included) with the rows emitted so far and the commit's resume point;
// its cursor is what the next Open sees; a failing hook leaves the last
// commit as the durable state and fails the pipeline.
func TestCommitHook(t *testing.T) {
	fs := vfs.NewMem()
	evs := genLogins(3, 5000, 50, 50, 30*time.Second)
	emitted := uint64(0)
	spec := loginSpec(func(Row[login]) { emitted++ })
	opts := Options{Mode: Settled, MaxDisorder: 30 * time.Second, CommitEvery: 700, Dir: "db", FS: fs}
	p, err := Open(spec, opts)
	require.NoError(t, err)
	var points []CommitPoint
	p.SetCommitHook(func(cp CommitPoint) ([]byte, error) {
		require.Equal(t, emitted, cp.Emitted, "rows emitted before the commit")
		require.LessOrEqual(t, cp.Resume, cp.NextSeq)
		require.Equal(t, p.Stats().NextSeq, cp.NextSeq)
		points = append(points, cp)
		return []byte{byte(len(points))}, nil
	})
	for _, e := range evs[:3000] {
		require.NoError(t, p.Process(e))
	}
	require.Len(t, points, 3000/700, "one per automatic commit")
	// Automatic commits may land in the background; an explicit one is
	// durable on return.
	require.NoError(t, p.Commit(nil))
	require.Len(t, points, 3000/700+1)
	last := points[len(points)-1]
	require.Equal(t, last.Resume, p.ResumeSeq())
	require.Equal(t, []byte{byte(len(points))}, p.Cursor())
	require.Less(t, last.Resume, last.NextSeq, "Settled holds events at a commit")

	boom := errors.New("table disk full")
	p.SetCommitHook(func(CommitPoint) ([]byte, error) { return nil, boom })
	require.ErrorIs(t, p.Commit(nil), boom)
	require.ErrorIs(t, p.Process(evs[3000]), boom, "the pipeline failed")
	p.Close()

	p, err = Open(spec, opts)
	require.NoError(t, err)
	defer p.Close()
	require.Equal(t, last.Resume, p.ResumeSeq(), "the failed commit wrote nothing")
	require.Equal(t, []byte{byte(len(points))}, p.Cursor())
}
