package tallyward

import (
	"flag"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"
)

var rewriteProgress = flag.Bool("progress.rewrite", false, "rewrite testdata/progress_v2.bin")

// The progress record's layouts: version 1 (written before the re-read
// rule changed) still decodes, with its list of future-rejected seqs as
// the skip list and the newest time standing for the newest at resume;
// version 2 is pinned byte for byte.
func TestProgressFormats(t *testing.T) {
	b, err := os.ReadFile(filepath.Join("testdata", "progress_v1.bin"))
	require.NoError(t, err)
	var v1 progress
	require.NoError(t, v1.decode(b))
	require.Equal(t, progress{hasMax: true, maxT: t0,
		c:            counters{events: 9, applied: 7, emitted: 7, live: 3, rejected: [numReasons]uint64{1, 2, 3}},
		resumeNewest: newestTime{true, t0}, skipReread: []uint64{4, 8, 15}}, v1)

	pr := progress{hasMax: true, maxT: t0, flushed: true,
		c:            counters{events: 90, applied: 70, emitted: 60, late: 5, tooOld: 1, live: 3, expired: 2, erased: 1, erasedSkips: 4, rejected: [numReasons]uint64{1, 2, 3, 4, 5}},
		resumeNewest: newestTime{true, t0 - 7}, skipReread: []uint64{41, 48}, hasReset: true, resetSeq: 44, resetTo: t0 - 9, resetWm: t0 - 3}
	path := filepath.Join("testdata", "progress_v2.bin")
	if *rewriteProgress {
		require.NoError(t, os.WriteFile(path, pr.append(nil), 0o644))
	}
	want, err := os.ReadFile(path)
	require.NoError(t, err)
	require.Equal(t, want, pr.append(nil))
	var back progress
	require.NoError(t, back.decode(want))
	require.Equal(t, pr, back)
}
