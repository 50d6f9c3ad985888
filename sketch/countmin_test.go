package sketch

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"
)

// TestCountMinDims pins the published sizing: eps=0.001, delta=0.01 gives
// w=2719, d=5 (Cormode, Muthukrishnan, J. Algorithms 55(1), 2005).
func TestCountMinDims(t *testing.T) {
	w, d := CountMinParams{Epsilon: 0.001, Delta: 0.01}.Dims()
	if w != 2719 || d != 5 {
		t.Fatalf("dims %d x %d, want 2719 x 5", w, d)
	}
	if err := (CountMinParams{Epsilon: 2, Delta: -1}).Validate(); err == nil || !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("Validate: %v", err)
	} else if n := len(err.(interface{ Unwrap() []error }).Unwrap()); n != 2 {
		t.Fatalf("Validate reported %d problems, want 2", n)
	}
}

// TestCountMinBounds: estimates never fall below the exact count (a Go map)
// and exceed it by more than eps*N for at most a delta fraction of items
// (Cormode, Muthukrishnan, J. Algorithms 55(1), 2005). The failure rate is
// checked over all distinct items of a skewed stream, with slack of 4
// binomial standard deviations.
func TestCountMinBounds(t *testing.T) {
	p := CountMinParams{Epsilon: 0.001, Delta: 0.01}
	for seed := range uint64(3) {
		rng := rand.New(rand.NewPCG(seed, 21))
		cm, _ := NewCountMin(p)
		exact := map[uint64]uint64{}
		zipf := rand.NewZipf(rng, 1.2, 1, 200000)
		const N = 1_000_000
		for range N {
			h := HashString(string(rune('a'+zipf.Uint64()%26)) + string(rune(zipf.Uint64())))
			cm.Add(h, 1)
			exact[h]++
		}
		bound := p.Epsilon * N // 1000 with probability 0.99
		fails := 0
		for h, f := range exact {
			est := cm.Estimate(h)
			if est < f {
				t.Fatalf("underestimate %d < %d", est, f)
			}
			if float64(est-f) > bound {
				fails++
			}
		}
		n := float64(len(exact))
		if limit := p.Delta*n + 4*math.Sqrt(p.Delta*(1-p.Delta)*n); float64(fails) > limit {
			t.Fatalf("seed %d: %d of %.0f items beyond eps*N, limit %.0f", seed, fails, n, limit)
		}
		if cm.Count() != N || cm.ErrorBound() != bound {
			t.Fatalf("total %d bound %v", cm.Count(), cm.ErrorBound())
		}
		t.Logf("seed %d: %.0f items, %d beyond eps*N=%.0f (delta allows %.0f)", seed, n, fails, bound, p.Delta*n)
	}
}

func TestCountMinMergeAndRoundTrip(t *testing.T) {
	p := CountMinParams{Epsilon: 0.01, Delta: 0.05}
	whole, a, b := mustCM(t, p), mustCM(t, p), mustCM(t, p)
	rng := rand.New(rand.NewPCG(1, 2))
	for i := range 5000 {
		h, c := rng.Uint64N(300), rng.Uint64N(5)+1
		whole.Add(HashString(string(rune(h))), c)
		if i%3 == 0 {
			a.Add(HashString(string(rune(h))), c)
		} else {
			b.Add(HashString(string(rune(h))), c)
		}
	}
	ab, ba := mustCM(t, p), mustCM(t, p)
	_ = ab.Merge(a)
	_ = ab.Merge(b)
	_ = ba.Merge(b)
	_ = ba.Merge(a)
	for _, m := range []*CountMin{ab, ba} {
		for i := range 300 {
			h := HashString(string(rune(i)))
			if m.Estimate(h) != whole.Estimate(h) {
				t.Fatal("merge differs from the whole stream")
			}
		}
	}
	blob, _ := whole.AppendBinary(nil)
	var c CountMin
	if err := c.UnmarshalBinary(blob); err != nil {
		t.Fatal(err)
	}
	for i := range 300 {
		h := HashString(string(rune(i)))
		if c.Estimate(h) != whole.Estimate(h) {
			t.Fatal("round trip differs")
		}
	}
	if err := c.Merge(mustCM(t, CountMinParams{})); !errors.Is(err, ErrIncompatible) {
		t.Fatalf("merge with other params: %v", err)
	}
}

func mustCM(t testing.TB, p CountMinParams) *CountMin {
	c, err := NewCountMin(p)
	if err != nil {
		t.Fatal(err)
	}
	return c
}

// The zero parameters mean epsilon 0.01 and delta 0.01: width ceil(e/0.01)
// = 272 and depth ceil(ln 100) = 5 (Cormode, Muthukrishnan 2005 sizing).
func TestCountMinDefaultDims(t *testing.T) {
	if w, d := (CountMinParams{}).Dims(); w != 272 || d != 5 {
		t.Fatalf("default dims %d x %d, want 272 x 5", w, d)
	}
}

// CountMinParamsOf reads the parameters alone, so a caller can refuse a
// blob before its cells are allocated; a damaged header is an error.
func TestCountMinParamsOf(t *testing.T) {
	p := CountMinParams{Epsilon: 0.001, Delta: 0.01}
	c := mustCM(t, p)
	c.Add(HashString("a"), 3)
	blob, _ := c.AppendBinary(nil)
	got, err := CountMinParamsOf(blob)
	if err != nil || got != p {
		t.Fatalf("CountMinParamsOf = %+v, %v; want %+v", got, err, p)
	}
	for _, bad := range [][]byte{nil, blob[:1], blob[:10], append([]byte{0xff}, blob[1:]...)} {
		if _, err := CountMinParamsOf(bad); err == nil {
			t.Fatalf("CountMinParamsOf(%x) gave no error", bad)
		}
	}
}
