package window

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat"
)

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.Abs(got-want) > tol {
		t.Errorf("%s = %.6f, want %.6f (±%g)", what, got, want, tol)
	}
}

// Forward decay: Cormode, Shkapenyuk, Srivastava, Xu, "Forward decay: a
// practical time decay model for streaming systems", ICDE 2009. With
// lambda = ln2/10, v = 1 at t = 0 and t = 10, the decayed sum at t = 20 is
// (1 + 2)/4 = 0.75 in either arrival order (derived from the paper's
// formula); after one half-life a weight is exactly 0.5.
func TestForwardDecayHalfLifeExample(t *testing.T) {
	for _, order := range [][]int64{{0, 10}, {10, 0}} {
		d := must(NewDecayed(DecaySpec{HalfLife: 10, Horizon: 100}))
		for _, ts := range order {
			d.Add(ts, 1)
		}
		if got := d.SumAt(20); got != 0.75 {
			t.Errorf("order %v: SumAt(20) = %v, want 0.75", order, got)
		}
		if got := d.CountAt(20); got != 0.75 {
			t.Errorf("order %v: CountAt(20) = %v, want 0.75", order, got)
		}
	}
	d := must(NewDecayed(DecaySpec{HalfLife: 10}))
	d.Add(0, 1)
	if got := d.CountAt(10); got != 0.5 {
		t.Errorf("weight after one half-life = %v, want exactly 0.5", got)
	}
}

// Welford, "Note on a method for calculating corrected sums of squares and
// products", Technometrics 4(3), 1962: 2,4,4,4,5,5,7,9 -> mean 5, M2 32,
// population variance 4. Equal times give equal weights, so the decayed
// statistics reduce to the unweighted ones.
func TestWelfordExample(t *testing.T) {
	d := must(NewDecayed(DecaySpec{HalfLife: 1e9}))
	for _, x := range []float64{2, 4, 4, 4, 5, 5, 7, 9} {
		d.Add(1000, x)
	}
	near(t, "mean", d.MeanAt(1000), 5, 1e-12)
	near(t, "population variance", d.VarianceAt(1000), 4, 1e-12)
	near(t, "M2", d.VarianceAt(1000)*d.CountAt(1000), 32, 1e-12)
	// Sample variance 4.5714 = M2/(n−1), same source.
	near(t, "sample variance", 32/(d.CountAt(1000)-1), 4.5714, 1e-4)
}

// Chan, Golub, LeVeque, "Algorithms for computing the sample variance",
// American Statistician 37(3), 1983: [2,4,4,4] (M2 3) and [5,5,7,9] (M2 11)
// merge to M2 32. Here the second half arrives after the first has been
// folded (Horizon 0, all at one time), which must give the same M2.
func TestChanGolubLeVequeExample(t *testing.T) {
	d := must(NewDecayed(DecaySpec{HalfLife: 1e9}))
	for _, x := range []float64{2, 4, 4, 4} {
		d.Add(7, x)
	}
	near(t, "M2 of the first half", d.VarianceAt(7)*d.CountAt(7), 3, 1e-12)
	for _, x := range []float64{5, 5, 7, 9} {
		d.Add(7, x)
	}
	near(t, "merged M2", d.VarianceAt(7)*d.CountAt(7), 32, 1e-12)
}

// West, "Updating mean and variance estimates: an improved method", CACM
// 22(9), 1979: x = 1,2,3 with w = 1,2,3 -> mean 2.3333, variance (S/W)
// 0.5556.
func TestWestWeightedExample(t *testing.T) {
	var w, mean, m2 float64
	for i, x := range []float64{1, 2, 3} {
		w, mean, m2 = westUpdate(w, mean, m2, float64(i+1), x)
	}
	near(t, "weighted mean", mean, 2.3333, 1e-4)
	near(t, "weighted variance S/W", m2/w, 0.5556, 1e-4)
}

// Decayed variance (derived in REFERENCES.md from the forward-decay
// weights): x = 10 at t = 0, x = 20 at t = h, half-life h, query at h ->
// mean 16.667, variance 22.222.
func TestDecayedVarianceExample(t *testing.T) {
	const h = 3600e9
	d := must(NewDecayed(DecaySpec{HalfLife: h}))
	d.Add(0, 10)
	d.Add(h, 20)
	near(t, "decayed mean", d.MeanAt(h), 16.667, 1e-3)
	near(t, "decayed variance", d.VarianceAt(h), 22.222, 1e-3)
}

// Weighted mean and population variance against gonum.org/v1/gonum/stat on
// random data: the decayed weights 2^(−(t − ti)/h) are the weights.
func TestDecayedAgainstGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(42, 1))
	for trial := range 200 {
		h := int64(1 + rng.IntN(1000))
		d := must(NewDecayed(DecaySpec{HalfLife: time.Duration(h), Horizon: time.Duration(int64(rng.IntN(5000)))}))
		n := 1 + rng.IntN(200)
		xs, ws := make([]float64, n), make([]float64, n)
		ts := make([]int64, n)
		var maxT int64
		for i := range n {
			ts[i] = int64(rng.IntN(20000))
			xs[i] = rng.NormFloat64()*50 + 100
			d.Add(ts[i], xs[i])
			maxT = max(maxT, ts[i])
		}
		q := maxT + int64(rng.IntN(100))
		for i := range n {
			ws[i] = math.Exp2(-float64(q-ts[i]) / float64(h))
		}
		if floats(ws) == 0 {
			continue
		}
		wm := stat.Mean(xs, ws)
		wv := stat.PopVariance(xs, ws)
		if got := d.MeanAt(q); math.Abs(got-wm) > 1e-9*math.Abs(wm) {
			t.Errorf("trial %d: MeanAt = %v, gonum %v", trial, got, wm)
		}
		if got := d.VarianceAt(q); math.Abs(got-wv) > 1e-7*wv+1e-9 {
			t.Errorf("trial %d: VarianceAt = %v, gonum %v", trial, got, wv)
		}
	}
}

func floats(xs []float64) float64 {
	var s float64
	for _, x := range xs {
		s += x
	}
	return s
}

// Landmark rebasing must not lose precision or overflow over a long history:
// years of daily events with a one-day half-life.
func TestDecayedYearsOfHistory(t *testing.T) {
	const day = int64(86400e9)
	d := must(NewDecayed(DecaySpec{HalfLife: time.Duration(day), RebaseEvery: 8}))
	for i := range int64(3650) {
		d.Add(i*day, 1)
	}
	// A geometric series: Σ 2^−k over k = 0..∞ → 2.
	near(t, "decayed count after ten years", d.CountAt(3649*day), 2, 1e-9)
	near(t, "variance of constant values", d.VarianceAt(3649*day), 0, 1e-12)
	if c := d.CountAt(math.MaxInt64); c != 0 || math.IsNaN(c) {
		t.Errorf("CountAt(far future) = %v, want 0", c)
	}
}
