package window

import (
	"github.com/tallyward/tallyward/internal/sat"
)

// Window assignment helpers for tumbling and hopping windows. Windows are
// half-open [start, start+width) and aligned to the Unix epoch, so every
// process cuts the same windows.

// TumblingStart returns the start of the tumbling window of the given width
// that holds t: floor(t / width) · width. It returns t unchanged when
// width <= 0, and saturates at the ends of the int64 range.
func TumblingStart(t, width int64) int64 {
	if width <= 0 {
		return t
	}
	return startOf(sat.FloorDiv(t, width), width)
}

// MaxHoppingOverlap bounds width/hop for HoppingStarts, so that a bad
// setting cannot make it allocate without limit.
const MaxHoppingOverlap = 1 << 12

// HoppingStarts appends to dst the start of every hopping window of the
// given width, starting every hop nanoseconds, that holds t, oldest first:
// each s with s mod hop = 0 and s <= t < s + width. It appends nothing when
// width <= 0, hop <= 0 or width/hop > MaxHoppingOverlap.
//
// A window starting at s is [s, s+width); at most ceil(width/hop) windows
// overlap any instant, so size dst accordingly to avoid an allocation.
func HoppingStarts(dst []int64, t, width, hop int64) []int64 {
	if width <= 0 || hop <= 0 || width/hop > MaxHoppingOverlap {
		return dst
	}
	lo := sat.Sub(t, width-1) // starts lie in [t − width + 1, t]
	first := lo / hop         // ceil(lo / hop): truncation rounds negatives up
	if lo > 0 && lo%hop != 0 {
		first++
	}
	for i := first; i <= sat.FloorDiv(t, hop); i++ {
		dst = append(dst, i*hop)
	}
	return dst
}
