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

// FloorDiv, Mul and AddU64 against big-integer arithmetic.
func TestDivMulAgainstBigInt(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	for range 100_000 {
		a := int64(r.Uint64())
		b := int64(r.Uint64()>>uint(r.IntN(63))) | 1
		if b < 0 {
			b = -b
		}
		if b <= 0 {
			b = 1
		}
		q := new(big.Int)
		m := new(big.Int)
		q.DivMod(big.NewInt(a), big.NewInt(b), m) // Euclidean: floor for b > 0
		if got := FloorDiv(a, b); got != q.Int64() {
			t.Fatalf("FloorDiv(%d, %d) = %d, want %d", a, b, got, q.Int64())
		}
		p := new(big.Int).Mul(big.NewInt(a), big.NewInt(b))
		want := p.Int64()
		if p.Cmp(big.NewInt(math.MaxInt64)) > 0 {
			want = math.MaxInt64
		} else if p.Cmp(big.NewInt(math.MinInt64)) < 0 {
			want = math.MinInt64
		}
		if got := Mul(a, b); got != want {
			t.Fatalf("Mul(%d, %d) = %d, want %d", a, b, got, want)
		}
		x, y := r.Uint64(), r.Uint64()>>uint(r.IntN(64))
		s := new(big.Int).Add(new(big.Int).SetUint64(x), new(big.Int).SetUint64(y))
		wu := uint64(math.MaxUint64)
		if s.IsUint64() {
			wu = s.Uint64()
		}
		if got := AddU64(x, y); got != wu {
			t.Fatalf("AddU64(%d, %d) = %d, want %d", x, y, got, wu)
		}
	}
}
