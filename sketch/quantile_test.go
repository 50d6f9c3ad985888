package sketch

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
)

func mustQ(t testing.TB, p QuantileParams) *Quantile {
	s, err := NewQuantile(p)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// TestQuantileWorkedValues: alpha=0.01, x=100 maps to i=231, bucket
// (99.4996, 101.5097], estimate 100.4946; x=1 maps to estimate 0.99, exactly
// -alpha relative (Masson, Rim, Lee, "DDSketch", PVLDB 12(12), 2019).
func TestQuantileWorkedValues(t *testing.T) {
	s := mustQ(t, QuantileParams{RelativeAccuracy: 0.01})
	if i := s.index(100); i != 231 {
		t.Fatalf("index(100) = %d, want 231", i)
	}
	g := s.gamma
	if lo, hi := math.Pow(g, 230), math.Pow(g, 231); math.Abs(lo-99.4996) > 1e-4 || math.Abs(hi-101.5097) > 1e-4 {
		t.Fatalf("bucket (%v, %v]", lo, hi)
	}
	if v := s.value(231); math.Abs(v-100.4946) > 1e-4 {
		t.Fatalf("value(231) = %v", v)
	}
	s.Add(1)
	s.Add(1.0000001) // same bucket; clamping to [min, max] must not hide the bucket value
	if v := s.value(s.index(1)); math.Abs(v-0.99) > 1e-12 {
		t.Fatalf("estimate of 1 = %v, want 0.99", v)
	}
}

// TestQuantileRankConvention pins rank floor(1+q(n-1)) (1-based; the
// paper's convention): with exact buckets (values 1..5 spaced beyond gamma)
// q=0.5 of 1,2,3,4 is the 2nd value and q=0.75 the 3rd.
func TestQuantileRankConvention(t *testing.T) {
	s := mustQ(t, QuantileParams{RelativeAccuracy: 0.01})
	for _, x := range []float64{4, 1, 3, 2} {
		s.Add(x)
	}
	for _, c := range []struct{ q, want float64 }{{0, 1}, {0.5, 2}, {0.75, 3}, {1, 4}} {
		got, _ := s.Value(c.q)
		if math.Abs(got-c.want) > 0.01*c.want+1e-12 {
			t.Fatalf("Value(%v) = %v, want %v", c.q, got, c.want)
		}
	}
}

// TestQuantileRelativeError: at every tested q the estimate is within
// alpha*|x| (+1e-12) of the exact value of that rank in a sorted slice, for
// positive, negative and mixed streams (DDSketch, PVLDB 2019). gonum's
// empirical quantile is checked to be one of the sorted values (an outside
// reference for the sorted-slice rank).
func TestQuantileRelativeError(t *testing.T) {
	qs := []float64{0, 0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99, 0.999, 1}
	for _, alpha := range []float64{0.001, 0.01, 0.05} {
		for seed := range uint64(5) {
			rng := rand.New(rand.NewPCG(seed, 31))
			s := mustQ(t, QuantileParams{RelativeAccuracy: alpha, MaxBuckets: 1 << 16})
			xs := make([]float64, 20000)
			for i := range xs {
				x := math.Exp(rng.NormFloat64()*3) * 50
				switch seed % 3 {
				case 1:
					x = -x
				case 2:
					if rng.IntN(3) == 0 {
						x = -x
					}
					if rng.IntN(50) == 0 {
						x = 0
					}
				}
				xs[i] = x
				s.Add(x)
			}
			slices.Sort(xs)
			for _, q := range qs {
				got, _ := s.Value(q)
				want := xs[int(q*float64(len(xs)-1))]
				if math.Abs(got-want) > alpha*math.Abs(want)+1e-12 {
					t.Fatalf("alpha %v seed %d q %v: %v, exact %v", alpha, seed, q, got, want)
				}
				if g := stat.Quantile(q, stat.Empirical, xs, nil); !slices.Contains(xs, g) {
					t.Fatalf("gonum quantile %v not a sample", g)
				}
			}
		}
	}
}

// TestQuantileMergeOrderFree: bucket counts add, so merging parts in any
// order equals adding the whole stream; the encoding round-trips.
func TestQuantileMergeOrderFree(t *testing.T) {
	p := QuantileParams{RelativeAccuracy: 0.02, MaxBuckets: 64}
	rng := rand.New(rand.NewPCG(9, 9))
	whole := mustQ(t, p)
	parts := []*Quantile{mustQ(t, p), mustQ(t, p), mustQ(t, p)}
	for i := range 9000 {
		x := (rng.Float64() - 0.3) * math.Pow(10, float64(rng.IntN(12)))
		whole.Add(x)
		parts[i%3].Add(x)
	}
	for _, order := range [][]int{{0, 1, 2}, {2, 0, 1}} {
		m := mustQ(t, p)
		for _, i := range order {
			if err := m.Merge(parts[i]); err != nil {
				t.Fatal(err)
			}
		}
		ma, _ := m.AppendBinary(nil)
		var c Quantile
		if err := c.UnmarshalBinary(ma); err != nil {
			t.Fatal(err)
		}
		for q := 0.0; q <= 1; q += 0.01 {
			x, _ := whole.Value(q)
			y, _ := m.Value(q)
			z, _ := c.Value(q)
			if x != y || y != z {
				t.Fatalf("order %v q %v: whole %v merged %v decoded %v", order, q, x, y, z)
			}
		}
	}
	if len(whole.pos.counts) > p.MaxBuckets || len(whole.neg.counts) > p.MaxBuckets {
		t.Fatal("bucket bound exceeded")
	}
	if err := whole.Merge(mustQ(t, QuantileParams{})); !errors.Is(err, ErrIncompatible) {
		t.Fatalf("merge with other params: %v", err)
	}
	if whole.Add(math.NaN()) || whole.Add(math.Inf(-1)) {
		t.Fatal("accepted a non-finite value")
	}
}

// TestQuantileCollapseKeepsUpperRanks: once MaxBuckets forces a collapse of
// the smallest magnitudes, ranks above the collapsed bucket keep the alpha
// guarantee (DDSketch, PVLDB 2019, collapsing the lowest buckets).
func TestQuantileCollapseKeepsUpperRanks(t *testing.T) {
	s := mustQ(t, QuantileParams{RelativeAccuracy: 0.01, MaxBuckets: 100})
	rng := rand.New(rand.NewPCG(4, 4))
	xs := make([]float64, 10000)
	for i := range xs {
		xs[i] = math.Exp(rng.Float64() * 10) // span e^10: about 500 buckets
		s.Add(xs[i])
	}
	slices.Sort(xs)
	if len(s.pos.counts) > 100 {
		t.Fatalf("%d buckets", len(s.pos.counts))
	}
	for _, q := range []float64{0.9, 0.95, 0.99, 1} {
		got, _ := s.Value(q)
		want := xs[int(q*float64(len(xs)-1))]
		if math.Abs(got-want) > 0.01*want+1e-12 {
			t.Fatalf("q %v: %v, exact %v", q, got, want)
		}
	}
}
