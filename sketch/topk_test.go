package sketch

import (
	"errors"
	"math/rand/v2"
	"slices"
	"testing"
)

func mustTopK(t testing.TB, m int) *TopK {
	s, err := NewTopK(TopKParams{Capacity: m})
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// TestTopKWorkedExample: m=2, stream a a a b c ends with a:3 and c:2 (err
// 1); the evicted b has f=1 <= the minimum counter (Metwally, Agrawal, El
// Abbadi, ICDT 2005).
func TestTopKWorkedExample(t *testing.T) {
	s := mustTopK(t, 2)
	a, b, c := HashString("a"), HashString("b"), HashString("c")
	for _, h := range []uint64{a, a, a, b, c} {
		s.Add(h, 1)
	}
	got := s.Top(nil, 2)
	want := []Counter{{a, 3, 0}, {c, 2, 1}}
	if !slices.Equal(got, want) {
		t.Fatalf("top %+v, want %+v", got, want)
	}
	if _, ok := s.Estimate(b); ok || s.ErrorBound() != 2 || 1 > s.ErrorBound() {
		t.Fatalf("b monitored=%v, bound %d", ok, s.ErrorBound())
	}
	if s.TopShare() != 3.0/5 {
		t.Fatalf("top share %v", s.TopShare())
	}
}

// TestTopKInvariants checks the Space-Saving invariants of Metwally et al.
// (ICDT 2005) against exact counts (a Go map) over seeded skewed streams:
// counts sum to N, min counter <= N/m, Count-Err <= f <= Count, and every
// item with f > N/m is monitored.
func TestTopKInvariants(t *testing.T) {
	for seed := range uint64(20) {
		rng := rand.New(rand.NewPCG(seed, 3))
		m := 1 + int(seed%7)*8
		s := mustTopK(t, m)
		exact := map[uint64]uint64{}
		zipf := rand.NewZipf(rng, 1.1+float64(seed%3)/2, 1, 5000)
		for range 20000 {
			h, w := HashString(string(rune(zipf.Uint64()))), 1+rng.Uint64N(3)
			s.Add(h, w)
			exact[h] += w
		}
		checkTopK(t, s, exact, true)
	}
}

func checkTopK(t *testing.T, s *TopK, exact map[uint64]uint64, sumIsN bool) {
	t.Helper()
	var sum, n uint64
	for _, f := range exact {
		n += f
	}
	cs := s.Top(nil, s.Len())
	for _, c := range cs {
		sum += c.Count
		f := exact[c.Hash]
		if c.Count < f || c.Count-c.Err > f {
			t.Fatalf("counter %+v, exact %d", c, f)
		}
	}
	if sumIsN && sum != n {
		t.Fatalf("counts sum %d, N %d", sum, n)
	}
	if s.Len() == s.Params().Capacity && sumIsN && s.ErrorBound()*uint64(s.Len()) > n {
		t.Fatalf("min counter %d > N/m", s.ErrorBound())
	}
	for h, f := range exact {
		if _, ok := s.Estimate(h); !ok && f > s.ErrorBound() {
			t.Fatalf("unmonitored item with f=%d > bound %d", f, s.ErrorBound())
		}
	}
}

// TestTopKMerge: after merging, the per-counter bounds and the unmonitored
// bound still hold against the exact counts of the union, Merge is
// commutative, and the encoding round-trips.
func TestTopKMerge(t *testing.T) {
	for seed := range uint64(10) {
		rng := rand.New(rand.NewPCG(seed, 17))
		a, b := mustTopK(t, 16), mustTopK(t, 16)
		exact := map[uint64]uint64{}
		zipf := rand.NewZipf(rng, 1.3, 1, 3000)
		for i := range 10000 {
			h := HashString(string(rune(zipf.Uint64())))
			exact[h]++
			if i%3 == 0 {
				a.Add(h, 1)
			} else {
				b.Add(h, 1)
			}
		}
		ab, ba := mustTopK(t, 16), mustTopK(t, 16)
		_ = ab.Merge(a)
		_ = ab.Merge(b)
		_ = ba.Merge(b)
		_ = ba.Merge(a)
		if !slices.Equal(ab.Top(nil, 16), ba.Top(nil, 16)) {
			t.Fatal("merge not commutative")
		}
		checkTopK(t, ab, exact, false)
		// Further adds keep the bounds.
		for range 2000 {
			h := HashString(string(rune(zipf.Uint64())))
			exact[h]++
			ab.Add(h, 1)
		}
		checkTopK(t, ab, exact, false)
		blob, _ := ab.AppendBinary(nil)
		var c TopK
		if err := c.UnmarshalBinary(blob); err != nil {
			t.Fatal(err)
		}
		// The decoded copy evicts exactly like the original.
		for range 500 {
			h := HashString(string(rune(zipf.Uint64())))
			ab.Add(h, 1)
			c.Add(h, 1)
		}
		if !slices.Equal(ab.Top(nil, 16), c.Top(nil, 16)) || ab.ErrorBound() != c.ErrorBound() {
			t.Fatal("decoded summary diverged")
		}
	}
	if err := mustTopK(t, 3).Merge(mustTopK(t, 4)); !errors.Is(err, ErrIncompatible) {
		t.Fatalf("capacity mismatch: %v", err)
	}
}
