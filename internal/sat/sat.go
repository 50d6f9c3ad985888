// Package sat has saturating integer arithmetic for times and counts: a
// sum that would overflow sticks at the bound instead of wrapping, so
// "newest time plus a skew" or "watermark at +infinity minus a window"
// never flips sign, and a count at 2^64−1 stays there. It is the one home
// of these helpers for every tallyward package.
package sat

import (
	"math"
	"math/bits"
)

// Add returns a+b, clamped to [math.MinInt64, math.MaxInt64].
func Add(a, b int64) int64 {
	if b > 0 && a > math.MaxInt64-b {
		return math.MaxInt64
	}
	if b < 0 && a < math.MinInt64-b {
		return math.MinInt64
	}
	return a + b
}

// Sub returns a−b, clamped.
func Sub(a, b int64) int64 {
	if b == math.MinInt64 {
		if a >= 0 {
			return math.MaxInt64
		}
		return a - b
	}
	return Add(a, -b)
}

// AddU64 returns a+b, clamped to math.MaxUint64.
func AddU64(a, b uint64) uint64 {
	s, carry := bits.Add64(a, b, 0)
	if carry != 0 {
		return math.MaxUint64
	}
	return s
}

// FloorDiv returns floor(a / b) for b > 0 (Go's / truncates toward zero).
func FloorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}

// Mul returns a·b for b > 0, clamped.
func Mul(a, b int64) int64 {
	if a < math.MinInt64/b {
		return math.MinInt64
	}
	if a > math.MaxInt64/b {
		return math.MaxInt64
	}
	return a * b
}
