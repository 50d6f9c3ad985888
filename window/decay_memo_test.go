package window

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// TestDecayedMemoIsBitIdentical: a Decayed queried after every change
// (so its fold memo is used and kept up to date) answers bit for bit as
// one whose memo is dropped before every query, over seeded streams with
// in-order, out-of-order and late events, landmark moves (short
// half-lives, RebaseEvery 1), queries behind the newest time, resets and
// round trips through the encoding.
func TestDecayedMemoIsBitIdentical(t *testing.T) {
	kept := 0
	for seed := range uint64(40) {
		r := rand.New(rand.NewPCG(seed, 99))
		spec := DecaySpec{HalfLife: time.Duration(1 + r.IntN(50)), Horizon: time.Duration(r.IntN(400)), RebaseEvery: int64(1 + r.IntN(3))}
		memo, _ := NewDecayed(spec)
		plain, _ := NewDecayed(spec)
		now := int64(r.IntN(1000))
		for step := range 3000 {
			switch op := r.IntN(100); {
			case op < 70:
				tm := now + int64(r.IntN(20))
				if r.IntN(5) == 0 {
					tm = now - int64(r.IntN(int(spec.Horizon)+50)) // out of order, maybe late
				}
				now = max(now, tm)
				x := r.NormFloat64() * 100
				memo.Add(tm, x)
				plain.Add(tm, x)
			case op < 71:
				memo.Reset()
				plain.Reset()
			case op < 73:
				b, err := memo.AppendBinary(nil)
				if err != nil {
					t.Fatal(err)
				}
				if err := memo.UnmarshalBinary(b); err != nil {
					t.Fatal(err)
				}
			}
			q := now - int64(r.IntN(int(spec.Horizon)+1))
			if r.IntN(4) == 0 {
				q = now + int64(r.IntN(1000)) // ahead, maybe past the next landmark
			}
			plain.memo = nil
			c1, s1, m1, v1 := memo.stats(q)
			c2, s2, m2, v2 := plain.stats(q)
			for i, p := range [][2]float64{{c1, c2}, {s1, s2}, {m1, m2}, {v1, v2}} {
				if math.Float64bits(p[0]) != math.Float64bits(p[1]) {
					t.Fatalf("seed %d step %d: statistic %d at %d: %v with the memo, %v without", seed, step, i, q, p[0], p[1])
				}
			}
			if memo.memo != nil && memo.memo.n > 0 {
				kept++
			}
		}
	}
	if kept < 10_000 {
		t.Fatalf("the memo was kept after %d queries only; the test does not exercise it", kept)
	}
	t.Logf("a memo was kept after %d of %d queries", kept, 40*3000)
}
