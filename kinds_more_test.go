package tallyward

import (
	"context"
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
	sec := int64(time.Second)
	const (
		win  = 30 * time.Second
		res  = 10 * time.Second
		half = 90 * time.Second
	)
	kinds := []Feature[login]{
		{Name: "ever", Kind: DistinctEver{}, Item: addr},
		{Name: "surge", Kind: Surge{Window: win, HalfLife: half, Resolution: res}},
	}
	cases := 0
	for seed := uint64(0); cases < 5_000; seed++ {
		r := rand.New(rand.NewPCG(seed, 778))
		disorder := time.Duration(r.IntN(3)) * 4 * time.Second
		spec := Spec[login]{
			Time:     func(e login) int64 { return e.T },
			Entities: []Entity[login]{{Name: "acct", Key: func(e login) string { return e.Account }, Features: kinds}},
		}
		p := openTest(t, spec, Options{MaxDisorder: disorder})
		evs := make([]login, 150)
		tt := t0
		nAddr := 1 + r.IntN(40)
		for i := range evs {
			tt += r.Int64N(8 * sec)
			evs[i] = login{ID: uint64(i), T: tt, Account: []string{"a", "b"}[r.IntN(2)], Addr: string(rune('A' + r.IntN(nAddr)))}
		}
		evs = shuffleWithin(r, evs, disorder)
		var applied []login
		for _, e := range evs {
			got, err := p.Score(e, nil)
			require.NoError(t, err)
			applied = append(applied, e)
			// Distinct items ever, as of e.T (the sets stay in the sparse
			// range, where the count is exact: Heule et al., EDBT 2013).
			seen := map[string]bool{}
			// Surge: (c + 1) / (D·W·ln2/h + 1), c the window's count with
			// package window's pane semantics, D = Σ 2^(−(t−ti)/h).
			var c, d float64
			pane := func(x int64) int64 { return sat.FloorDiv(x, int64(res)) }
			for _, a := range applied {
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

// Invariant 2 for the two kinds: Settled rows are identical under any
// arrival order within MaxDisorder.
func TestMoreKindsSettledIndependentOfArrivalOrder(t *testing.T) {
	const d = 4 * time.Second
	base := genLogins(8, 4_000, 300, 500, 0)
	run := func(evs []login) map[uint64]string {
		rows := newRowLog()
		p := openTest(t, moreSpec(rows.add), Options{Mode: Settled, MaxDisorder: d, CommitEvery: -1})
		require.NoError(t, p.Replay(context.Background(), slice(evs)))
		require.Zero(t, p.Stats().Late)
		return rows.byEvent(evs)
	}
	want := run(base)
	require.Len(t, want, len(base))
	for s := range 5 {
		r := rand.New(rand.NewPCG(uint64(s), 98))
		require.Equal(t, want, run(shuffleWithin(r, base, d)), "shuffle %d", s)
	}
}

// Invariant 3 for the two kinds: closing and reopening the store part way
// (state encoded, decoded, and the source resumed from the stored
// position) gives the rows of one uninterrupted run.
func TestMoreKindsReopenResumesExactly(t *testing.T) {
	evs := genLogins(9, 6_000, 200, 300, 2*time.Second)
	opts := Options{Mode: Settled, MaxDisorder: 2 * time.Second, CommitEvery: 500, CacheBytes: 1 << 20}
	whole := newRowLog()
	p := openTest(t, moreSpec(whole.add), opts)
	require.NoError(t, p.Replay(context.Background(), slice(evs)))

	opts.Dir = t.TempDir()
	got := map[uint64]string{}
	for _, stop := range []int{1_700, 4_100, len(evs)} {
		rows := newRowLog()
		q, err := Open(moreSpec(rows.add), opts)
		require.NoError(t, err)
		start := q.ResumeSeq()
		for i := start; i < uint64(stop); i++ {
			if err := q.Process(evs[i]); err != nil {
				require.True(t, benign(err), err)
			}
		}
		if stop == len(evs) {
			require.NoError(t, q.Flush())
		}
		require.NoError(t, q.Commit(nil))
		require.NoError(t, q.Close())
		mergeRows(t, got, rows.rows)
	}
	require.Equal(t, whole.rows, got)
}
