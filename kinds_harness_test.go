package tallyward_test

import (
	"math"
	"slices"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/kindtest"
)

// The built-in kinds through the public harness that any user's kind
// runs, against brute-force references written from each kind's documented
// definition (package window states the pane and session rules). The
// root's own invariant tests go deeper on the full feature set; these show
// that the harness is the one the built-ins pass.

// inPanes reports whether an event at ti counts in a window of w split
// into panes of width res, as of q >= ti: its pane is one of the w/res
// panes ending with q's pane (epoch-aligned).
func inPanes(ti, q int64, w, res time.Duration) bool {
	return sat.FloorDiv(ti, int64(res)) > sat.FloorDiv(q, int64(res))-int64(w/res)
}

func TestBuiltinKindsPassHarness(t *testing.T) {
	const (
		win = 10 * time.Second
		res = time.Second
		hl  = 5 * time.Second
		gap = 3 * time.Second
	)
	// Forward-decay weight of an event at ti as of q: 2^(−(q−ti)/half-life)
	// (the definition of an exponentially decayed aggregate).
	weight := func(ti, q int64) float64 { return math.Exp2(-float64(q-ti) / float64(hl)) }
	cases := []struct {
		name string
		cfg  kindtest.Config
	}{
		{"SlidingCount", kindtest.Config{
			Kind: tallyward.SlidingCount{Window: win, Resolution: res},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				n := 0
				for _, e := range past {
					if inPanes(e.Time, q, win, res) {
						n++
					}
				}
				return float64(n)
			},
		}},
		{"SlidingSum", kindtest.Config{
			Kind: tallyward.SlidingSum{Window: win, Resolution: res},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				s := 0.0
				for _, e := range past {
					if inPanes(e.Time, q, win, res) {
						s += e.Value
					}
				}
				return s
			},
		}},
		{"SlidingMax", kindtest.Config{
			Kind: tallyward.SlidingMax{Window: win, Resolution: res},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				m := math.NaN() // empty window
				for _, e := range past {
					if inPanes(e.Time, q, win, res) && !(e.Value <= m) {
						m = e.Value
					}
				}
				return m
			},
		}},
		{"Velocity", kindtest.Config{
			Kind:      tallyward.Velocity{Short: 5 * time.Second, Long: 30 * time.Second, Resolution: res},
			Tolerance: 1e-12,
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				// (short + α) / (long·Short/Long + α), α = 1 (the
				// formula on window.Velocity).
				var short, long float64
				for _, e := range past {
					if inPanes(e.Time, q, 5*time.Second, res) {
						short++
					}
					if inPanes(e.Time, q, 30*time.Second, res) {
						long++
					}
				}
				return (short + 1) / (long*5/30 + 1)
			},
		}},
		{"DecayedCount", kindtest.Config{
			Kind:      tallyward.Decayed{HalfLife: hl},
			Tolerance: 1e-9, // float rounding of a sum of exponentials
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				s := 0.0
				for _, e := range past {
					s += weight(e.Time, q)
				}
				return s
			},
		}},
		{"DecayedMean", kindtest.Config{
			Kind:      tallyward.Decayed{HalfLife: hl, Stat: tallyward.DecayedMean},
			Tolerance: 1e-9,
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				var w, s float64
				for _, e := range past {
					w += weight(e.Time, q)
					s += weight(e.Time, q) * e.Value
				}
				if w == 0 {
					return math.NaN()
				}
				return s / w
			},
		}},
		{"Distinct", kindtest.Config{
			// Six items: far below the exact-set limit, so exact.
			Kind: tallyward.Distinct{Window: win, Resolution: res},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				seen := map[string]bool{}
				for _, e := range past {
					if inPanes(e.Time, q, win, res) {
						seen[e.Item] = true
					}
				}
				return float64(len(seen))
			},
		}},
		{"RecencySinceLast", kindtest.Config{
			Kind: tallyward.Recency{},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				// The newest event strictly before q, in seconds.
				for i := len(past) - 1; i >= 0; i-- {
					if past[i].Time < q {
						return float64(q-past[i].Time) / float64(time.Second)
					}
				}
				return math.NaN()
			},
		}},
		{"RecencySession", kindtest.Config{
			Kind: tallyward.Recency{Stat: tallyward.SessionEvents, Gap: gap},
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				// Walk back from the newest event while gaps are <= Gap;
				// no session if the newest is more than Gap before q.
				if len(past) == 0 || q-past[len(past)-1].Time > int64(gap) {
					return 0
				}
				n := 1
				for i := len(past) - 1; i > 0 && past[i].Time-past[i-1].Time <= int64(gap); i-- {
					n++
				}
				return float64(n)
			},
		}},
		{"Frequency", kindtest.Config{
			// Six items, default epsilon: far from any collision in
			// practice, and Count-Min never undercounts; an exact
			// reference with tolerance 0 shows the lifetime wrapper's
			// as-of tail is exact.
			Kind: tallyward.Frequency{},
			Reference: func(past []kindtest.Event, _ int64, asking kindtest.Event) float64 {
				n := 0
				for _, e := range past {
					if e.Item == asking.Item {
						n++
					}
				}
				return float64(n)
			},
		}},
		{"TopShare", kindtest.Config{
			// Eight counters for six items: Space-Saving is then exact.
			Kind: tallyward.TopShare{Capacity: 8},
			Reference: func(past []kindtest.Event, _ int64, _ kindtest.Event) float64 {
				if len(past) == 0 {
					return math.NaN()
				}
				counts := map[string]int{}
				best := 0
				for _, e := range past {
					counts[e.Item]++
					best = max(best, counts[e.Item])
				}
				return float64(best) / float64(len(past))
			},
		}},
		{"Quantile", kindtest.Config{
			// A relative-error quantile summary answers within α of the
			// exact value of its rank (Masson, Rim and Lee, "DDSketch",
			// VLDB 2019); the rank is ⌊q·(n−1)⌋ of the sorted values, the
			// convention package sketch states.
			Kind:      tallyward.Quantile{Q: 0.9, RelativeAccuracy: 0.01},
			Tolerance: 0.01,
			Reference: func(past []kindtest.Event, _ int64, _ kindtest.Event) float64 {
				if len(past) == 0 {
					return math.NaN()
				}
				vs := make([]float64, len(past))
				for i, e := range past {
					vs[i] = e.Value
				}
				slices.Sort(vs)
				return vs[int(0.9*float64(len(vs)-1))]
			},
		}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) { kindtest.Run(t, c.cfg) })
	}
}
