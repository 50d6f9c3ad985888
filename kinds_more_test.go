package tallyward

import (
	"math"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"github.com/tallyward/tallyward/internal/sat"
)

// DistinctEver and Surge through the pipeline against a brute-force answer
// recomputed from the raw events applied so far, over seeded streams with
// arrival disorder within MaxDisorder (invariant 4, as for the other
// kinds in TestKindsAgainstBruteForce), with up to 61 items per stream
// (the public harness, TestMoreKindsPassHarness, runs six, and checks
// replay against live, shuffles and crashes).
func TestMoreKindsAgainstBruteForce(t *testing.T) {
	const (
		win  = 3 * time.Second
		res  = time.Second
		half = 9 * time.Second
	)
	features := []Feature[login]{
		{Name: "ever", Kind: DistinctEver{}, Item: addr},
		{Name: "surge", Kind: Surge{Window: win, HalfLife: half, Resolution: res}},
	}
	pane := func(x int64) int64 { return sat.FloorDiv(x, int64(res)) }
	cases := 0
	for seed := uint64(1); cases < 5_000; seed++ {
		disorder := time.Duration(seed%3) * 400 * time.Millisecond
		evs := genLogins(seed, 200, 4, 2+seed%60, disorder)
		p := openTest(t, Spec[login]{
			Time:     func(e login) int64 { return e.T },
			Entities: []Entity[login]{{Name: "acct", Key: func(e login) string { return e.Account }, Features: features}},
		}, Options{MaxDisorder: disorder})
		for i, e := range evs {
			got, err := p.Score(e, nil)
			require.NoError(t, err)
			// Distinct items ever as of e.T (the sets stay in the sparse
			// range, where the count is exact: Heule et al., EDBT 2013);
			// Surge (c + 1) / (D·W·ln2/h + 1), c the window's count with
			// package window's pane semantics, D = Σ 2^(−(t−ti)/h).
			seen := map[string]bool{}
			var c, d float64
			for _, a := range evs[:i+1] {
				if a.Account != e.Account || a.T > e.T {
					continue
				}
				seen[a.Addr] = true
				if pane(a.T) > pane(e.T)-int64(win/res) {
					c++
				}
				d += math.Exp2(-float64(e.T-a.T) / float64(half))
			}
			surge := (c + 1) / (d*float64(win)*math.Ln2/float64(half) + 1)
			require.Equal(t, float64(len(seen)), got[0], "seed %d event %d ever", seed, e.ID)
			require.InDelta(t, surge, got[1], 1e-9*surge, "seed %d event %d surge", seed, e.ID)
			cases++
		}
		p.Close()
	}
}
