package tallyward

import (
	"github.com/tallyward/tallyward/internal/sat"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// As-of correctness (invariant 4, DESIGN.md): every Eager row is checked
// against a brute-force recount from the raw events applied so far, over
// seeded random streams with out-of-order arrival within MaxDisorder.
//
// The reference implements the documented pane semantics directly: as of
// t, a window of n panes of width r counts the events with
// floor(ti/r) in [floor(t/r) − n + 1, floor(t/r)] and ti <= t.
func TestAsOfAgainstBruteForce(t *testing.T) {
	cases := 0
	for seed := uint64(0); cases < 12_000; seed++ {
		r := rand.New(rand.NewPCG(seed, 4242))
		res := time.Duration(1+r.IntN(20)) * time.Second
		win := res * time.Duration(1+r.IntN(30))
		disorder := time.Duration(r.IntN(3)) * res / 2
		before := r.IntN(2) == 0
		spec := Spec[login]{
			Time: func(e login) int64 { return e.T },
			Entities: []Entity[login]{{Name: "acct", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
				{Name: "n", Kind: SlidingCount{Window: win, Resolution: res}, Where: func(e login) bool { return e.OK }, BeforeEvent: before},
			}}},
		}
		// One to three workers: Score answers through the part that
		// owns the key, whatever the split.
		p := openTest(t, spec, Options{MaxDisorder: disorder, Workers: 1 + int(seed%3)})

		// Events in time order with gaps of up to two panes, then
		// shuffled within the disorder bound.
		evs := make([]login, 80+r.IntN(80))
		tt := t0 + r.Int64N(int64(res))
		for i := range evs {
			tt += r.Int64N(2 * int64(res))
			evs[i] = login{ID: uint64(i), T: tt, Account: []string{"a", "b", "c"}[r.IntN(3)], OK: r.IntN(5) != 0}
		}
		evs = shuffleWithin(r, evs, disorder)

		var applied []login
		for _, e := range evs {
			got, err := p.Score(e, nil)
			require.NoError(t, err)
			if e.OK {
				applied = append(applied, e)
			}
			q := e.T
			if before {
				q--
			}
			want := 0
			n := int64(win / res)
			for _, a := range applied {
				if a.Account == e.Account && a.T <= q && sat.FloorDiv(a.T, int64(res)) > sat.FloorDiv(q, int64(res))-n {
					want++
				}
			}
			require.Equal(t, float64(want), got[0], "seed %d event %d t=%d win=%v res=%v disorder=%v before=%v", seed, e.ID, e.T, win, res, disorder, before)
			cases++
		}
		p.Close()
	}
}
