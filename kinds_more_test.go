package tallyward

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"github.com/tallyward/tallyward/internal/sat"
)

// moreSpec is loginSpec plus DistinctEver and Surge on the account entity.
func moreSpec(emit func(Row[login])) Spec[login] {
	s := loginSpec(emit)
	s.Entities[1].Features = append(s.Entities[1].Features,
		Feature[login]{Name: "addrs_ever", Kind: DistinctEver{}, Item: addr},
		Feature[login]{Name: "addrs_ever_p4", Kind: DistinctEver{Precision: 4}, Item: addr}, // dense after a dozen items
		Feature[login]{Name: "surge_5m_1h", Kind: Surge{Window: 5 * time.Minute, HalfLife: time.Hour, Resolution: time.Minute}},
	)
	return s
}

// DistinctEver and Surge through the pipeline against a brute-force answer
// recomputed from the raw events applied so far, over seeded streams with
// arrival disorder within MaxDisorder (invariant 4, as for the other
// kinds in TestKindsAgainstBruteForce).
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

// Invariants 2 and 3 for the two kinds: Settled rows are the same for any
// arrival order within MaxDisorder, and closing and reopening the store
// part way (state encoded, decoded, the source resumed from the stored
// position) changes none of them.
func TestMoreKindsShuffledAndReopened(t *testing.T) {
	const disorder = 2 * time.Second
	base := genLogins(9, 4_000, 200, 300, 0)
	opts := Options{Mode: Settled, MaxDisorder: disorder, CommitEvery: 500, CacheBytes: 1 << 20}
	// runIn replays evs, closing and reopening the store at each stop.
	runIn := func(evs []login, stops ...int) map[uint64]string {
		o := opts
		o.Dir = t.TempDir()
		got := map[uint64]string{}
		for _, stop := range append(stops, len(evs)) {
			rows := newRowLog()
			q, err := Open(moreSpec(rows.add), o)
			require.NoError(t, err)
			for i := q.ResumeSeq(); i < uint64(stop); i++ {
				require.NoError(t, q.Process(evs[i]))
			}
			if stop == len(evs) {
				require.NoError(t, q.Flush())
			}
			require.NoError(t, q.Commit(nil))
			require.Zero(t, q.Stats().Late)
			require.NoError(t, q.Close())
			for seq, r := range rows.rows {
				if prev, ok := got[evs[seq].ID]; ok {
					require.Equal(t, prev, r, "row of event %d re-emitted differently after reopening", evs[seq].ID)
				}
				got[evs[seq].ID] = r
			}
		}
		return got
	}
	want := runIn(base)
	require.Len(t, want, len(base))
	for s := range 3 {
		r := rand.New(rand.NewPCG(uint64(s), 98))
		require.Equal(t, want, runIn(shuffleWithin(r, base, disorder), 1_100+s*500, 3_300), "shuffle %d", s)
	}
}
