// Package sat has saturating int64 arithmetic for times: a sum that would
// overflow sticks at the bound instead of wrapping, so "newest time plus a
// skew" or "watermark at +infinity minus a window" never flips sign.
package sat

import "math"

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
