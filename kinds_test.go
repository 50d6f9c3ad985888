package tallyward

import (
	"github.com/tallyward/tallyward/internal/sat"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// Every kind through the pipeline, checked against a brute-force answer
// recomputed from the raw events applied so far, over seeded random
// streams with out-of-order arrival within MaxDisorder (invariant 4).
func TestKindsAgainstBruteForce(t *testing.T) {
	sec := int64(time.Second)
	const (
		win  = 2 * time.Minute
		res  = 10 * time.Second
		half = 90 * time.Second
	)
	kinds := []Feature[login]{
		{Name: "sum", Kind: SlidingSum{Window: win, Resolution: res}, Value: amount},
		{Name: "min", Kind: SlidingMin{Window: win, Resolution: res}, Value: amount},
		{Name: "max", Kind: SlidingMax{Window: win, Resolution: res}, Value: amount},
		{Name: "mean", Kind: SlidingMean{Window: win, Resolution: res}, Value: amount},
		{Name: "dcount", Kind: Decayed{HalfLife: half}},
		{Name: "dsum", Kind: Decayed{HalfLife: half, Stat: DecayedSum}, Value: amount},
		{Name: "dmean", Kind: Decayed{HalfLife: half, Stat: DecayedMean}, Value: amount},
		{Name: "dvar", Kind: Decayed{HalfLife: half, Stat: DecayedVariance}, Value: amount},
		{Name: "velocity", Kind: Velocity{Short: 30 * time.Second, Long: win, Resolution: res}},
		{Name: "since", Kind: Recency{}},
		{Name: "age", Kind: Recency{Stat: Age}},
		{Name: "session", Kind: Recency{Stat: SessionEvents, Gap: 20 * time.Second}},
		{Name: "distinct", Kind: Distinct{Window: win, Resolution: res}, Item: addr},
		{Name: "freq", Kind: Frequency{}, Item: addr},
		{Name: "top", Kind: TopShare{}, Item: addr},
		{Name: "p90", Kind: Quantile{Q: 0.9}, Value: amount},
	}
	cases := 0
	for seed := uint64(0); cases < 10_000; seed++ {
		r := rand.New(rand.NewPCG(seed, 777))
		disorder := time.Duration(r.IntN(3)) * 4 * time.Second
		spec := Spec[login]{
			Time:     func(e login) int64 { return e.T },
			Entities: []Entity[login]{{Name: "acct", Key: func(e login) string { return e.Account }, Features: kinds}},
		}
		p := openTest(t, spec, Options{MaxDisorder: disorder})
		evs := make([]login, 150)
		tt := t0
		for i := range evs {
			tt += r.Int64N(8 * sec)
			evs[i] = login{ID: uint64(i), T: tt, Account: []string{"a", "b"}[r.IntN(2)],
				Addr: []string{"p", "q", "r", "s"}[r.IntN(4)], Amount: math.Round(r.NormFloat64()*1000) / 10}
		}
		evs = shuffleWithin(r, evs, disorder)
		var applied []login
		for _, e := range evs {
			got, err := p.Score(e, nil)
			require.NoError(t, err)
			applied = append(applied, e)
			var mine []login
			for _, a := range applied {
				if a.Account == e.Account {
					mine = append(mine, a)
				}
			}
			want := bruteForce(mine, e, win, res, half)
			for i, f := range kinds {
				w, g := want[f.Name], got[i]
				msg := []any{"seed %d event %d feature %s", seed, e.ID, f.Name}
				switch {
				case math.IsNaN(w):
					require.True(t, math.IsNaN(g), msg...)
				case f.Name == "p90":
					// Relative accuracy α = 0.01 (Masson, Rim, Lee,
					// "DDSketch", PVLDB 12(12), 2019).
					require.InDelta(t, w, g, 0.01*math.Abs(w)+1e-9, msg...)
				case f.Name == "freq":
					// Count-Min never underestimates; here ε·N < 1.5
					// (Cormode, Muthukrishnan, J. Algorithms 55(1), 2005).
					require.GreaterOrEqual(t, g, w, msg...)
					require.LessOrEqual(t, g, w+0.01*float64(len(mine)), msg...)
				case f.Name[0] == 'd' && f.Name != "distinct":
					require.InDelta(t, w, g, 1e-9*math.Max(1, math.Abs(w)), msg...)
				default:
					require.InDelta(t, w, g, 1e-9*math.Max(1, math.Abs(w)), msg...)
				}
			}
			cases++
		}
		p.Close()
	}
}

func amount(e login) float64 { return e.Amount }
func addr(e login) string    { return e.Addr }

// bruteForce recomputes every feature for event e from the entity's raw
// events, each by its published or documented definition.
func bruteForce(evs []login, e login, win, res, half time.Duration) map[string]float64 {
	t := e.T
	pane := func(x int64) int64 { return sat.FloorDiv(x, int64(res)) }
	// Sliding windows count events with pane(ti) in the window's panes up
	// to pane(t) and ti <= t (package window's documented semantics).
	inWindow := func(a login, w time.Duration) bool {
		return a.T <= t && pane(a.T) > pane(t)-int64(w/res)
	}
	out := map[string]float64{}
	var vals []float64
	var nShort, nLong int
	for _, a := range evs {
		if inWindow(a, win) {
			vals = append(vals, a.Amount)
			nLong++
		}
		if inWindow(a, 30*time.Second) {
			nShort++
		}
	}
	out["sum"], out["min"], out["max"], out["mean"] = 0, math.NaN(), math.NaN(), math.NaN()
	if len(vals) > 0 {
		for _, v := range vals {
			out["sum"] += v
		}
		out["min"], out["max"] = slices.Min(vals), slices.Max(vals)
		out["mean"] = out["sum"] / float64(len(vals))
	}
	// Velocity: (cS + α) / (cL·S/L + α) with α = 1.
	out["velocity"] = (float64(nShort) + 1) / (float64(nLong)*30/120 + 1)

	// Backward exponential decay, weight 2^(−(t−ti)/h) (Cormode et al.,
	// "Forward decay", ICDE 2009: forward decay equals it). Weighted mean
	// and population variance as in West, CACM 22(9), 1979.
	var w, sw, swx float64
	for _, a := range evs {
		if a.T <= t {
			wi := math.Exp2(-float64(t-a.T) / float64(half))
			w += wi
			sw += wi * a.Amount
		}
	}
	out["dcount"], out["dsum"] = w, sw
	out["dmean"], out["dvar"] = math.NaN(), math.NaN()
	if w > 0 {
		mean := sw / w
		for _, a := range evs {
			if a.T <= t {
				d := a.Amount - mean
				swx += math.Exp2(-float64(t-a.T)/float64(half)) * d * d
			}
		}
		out["dmean"], out["dvar"] = mean, swx/w
	}

	// Recency. since: from the newest event strictly before t.
	last, first := int64(math.MinInt64), int64(math.MaxInt64)
	for _, a := range evs {
		if a.T < t {
			last = max(last, a.T)
		}
		if a.T <= t {
			first = min(first, a.T)
		}
	}
	out["since"] = math.NaN()
	if last != math.MinInt64 {
		out["since"] = float64(t-last) / 1e9
	}
	out["age"] = float64(t-first) / 1e9
	// Session: walk back from t over events at or before t while the gaps
	// are at most 20 s.
	var times []int64
	for _, a := range evs {
		if a.T <= t {
			times = append(times, a.T)
		}
	}
	slices.Sort(times)
	n := 1
	for i := len(times) - 1; i > 0 && times[i]-times[i-1] <= int64(20*time.Second); i-- {
		n++
	}
	out["session"] = float64(n)

	// Distinct items in the window; frequency of e's item, top share and
	// the 0.9-quantile (rank floor(q·(n−1)) of the sorted values) over the
	// whole history at or before t.
	seen := map[string]bool{}
	counts := map[string]int{}
	var all []float64
	for _, a := range evs {
		if inWindow(a, win) {
			seen[a.Addr] = true
		}
		if a.T <= t {
			counts[a.Addr]++
			all = append(all, a.Amount)
		}
	}
	out["distinct"] = float64(len(seen))
	out["freq"] = float64(counts[e.Addr])
	best := 0
	for _, c := range counts {
		best = max(best, c)
	}
	out["top"] = float64(best) / float64(len(all))
	slices.Sort(all)
	out["p90"] = all[int(0.9*float64(len(all)-1))]
	return out
}

// A default spelled out is the same definition as the default left zero:
// reopening with either must not count as a change.
func TestDescribeIsCanonical(t *testing.T) {
	pairs := [][2]Kind{
		{SlidingCount{Window: time.Hour}, SlidingCount{Window: time.Hour, Resolution: time.Minute}},
		{Distinct{Window: time.Hour}, Distinct{Window: time.Hour, Resolution: time.Minute, Precision: 12}},
		{TopShare{}, TopShare{Capacity: 32}},
		{Quantile{Q: 0.5}, Quantile{Q: 0.5, RelativeAccuracy: 0.01}},
		{Frequency{}, Frequency{Epsilon: 0.01, Delta: 0.01}},
		{Velocity{Short: time.Minute, Long: time.Hour}, Velocity{Short: time.Minute, Long: time.Hour, Resolution: 6 * time.Second, Smoothing: 1}},
		{Recency{Stat: SessionEvents}, Recency{Stat: SessionEvents, Gap: 30 * time.Minute}},
	}
	for _, p := range pairs {
		require.Equal(t, p[0].Describe(), p[1].Describe())
	}
}
