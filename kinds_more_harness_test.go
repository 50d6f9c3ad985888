package tallyward_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/kindtest"
)

// DistinctEver and Surge through the public harness, against brute-force
// references written from their documented definitions.
func TestMoreKindsPassHarness(t *testing.T) {
	const (
		win = 3 * time.Second
		res = time.Second
		hl  = 8 * time.Second
	)
	distinctEver := func(past []kindtest.Event, _ int64, _ kindtest.Event) float64 {
		seen := map[string]bool{}
		for _, e := range past {
			seen[e.Item] = true
		}
		return float64(len(seen))
	}
	cases := []struct {
		name string
		cfg  kindtest.Config
	}{
		{"DistinctEver", kindtest.Config{
			// Six items: the sparse form counts them exactly (Heule,
			// Nunkesser, Hall, EDBT 2013: 25-bit sparse indices).
			Kind:      tallyward.DistinctEver{},
			Reference: distinctEver,
		}},
		{"DistinctEverDense", kindtest.Config{
			// 120 items at precision 4 (16 registers): dense early, so the
			// register copy, its encoding and the crash check are
			// exercised; accuracy within about 4 standard errors,
			// 4·1.04/√16 (Flajolet et al., AofA 2007).
			Kind:      tallyward.DistinctEver{Precision: 4},
			Item:      func(r *rand.Rand) string { return fmt.Sprint("device-", r.IntN(120)) },
			Tolerance: 1.1,
			Reference: distinctEver,
		}},
		{"Surge", kindtest.Config{
			Kind:      tallyward.Surge{Window: win, HalfLife: hl, Resolution: res},
			Tolerance: 1e-9, // float rounding of a sum of exponentials
			Reference: func(past []kindtest.Event, q int64, _ kindtest.Event) float64 {
				// (c + α) / (D·W·ln2/h + α), α = 1 (the formula on
				// window.Surge): c the events in the window's panes, D the
				// decayed count Σ 2^(−(q−ti)/h).
				var c, d float64
				for _, e := range past {
					if inPanes(e.Time, q, win, res) {
						c++
					}
					d += math.Exp2(-float64(q-e.Time) / float64(hl))
				}
				return (c + 1) / (d*float64(win)*math.Ln2/float64(hl) + 1)
			},
		}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) { kindtest.Run(t, c.cfg) })
	}
}
