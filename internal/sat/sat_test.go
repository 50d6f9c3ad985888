package sat

import (
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
)

// Checked against exact big-integer arithmetic, clamped.
func TestAgainstBigInt(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	edge := []int64{0, 1, -1, math.MaxInt64, math.MinInt64, math.MaxInt64 - 1, math.MinInt64 + 1}
	pick := func() int64 {
		if r.IntN(3) == 0 {
			return edge[r.IntN(len(edge))]
		}
		return int64(r.Uint64())
	}
	clamp := func(x *big.Int) int64 {
		if x.Cmp(big.NewInt(math.MaxInt64)) > 0 {
			return math.MaxInt64
		}
		if x.Cmp(big.NewInt(math.MinInt64)) < 0 {
			return math.MinInt64
		}
		return x.Int64()
	}
	for range 100_000 {
		a, b := pick(), pick()
		if got, want := Add(a, b), clamp(new(big.Int).Add(big.NewInt(a), big.NewInt(b))); got != want {
			t.Fatalf("Add(%d, %d) = %d, want %d", a, b, got, want)
		}
		if got, want := Sub(a, b), clamp(new(big.Int).Sub(big.NewInt(a), big.NewInt(b))); got != want {
			t.Fatalf("Sub(%d, %d) = %d, want %d", a, b, got, want)
		}
	}
}
