package sketch

import (
	"encoding/binary"
	"fmt"
	"github.com/tallyward/tallyward/internal/check"
	"math"

	"cmp"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
)

// QuantileParams shapes a relative-error quantile summary (Masson, Rim,
// Lee, "DDSketch: a fast and fully-mergeable quantile sketch with
// relative-error guarantees", PVLDB 12(12), 2019). The zero value of each
// field means its default.
type QuantileParams struct {
	// RelativeAccuracy alpha: every quantile estimate is within alpha*|x| of
	// the exact value x of that rank. Range [1e-4, 0.5]. Default 0.01.
	RelativeAccuracy float64
	// MaxBuckets bounds the buckets kept per sign. Beyond it the buckets of
	// smallest magnitude are collapsed into one, and the alpha guarantee no
	// longer holds for ranks that fall in that collapsed bucket. Range
	// 16..65536. Default 2048 (at alpha 0.01 a magnitude range of about
	// 10^17 before any collapse).
	MaxBuckets int
}

func (p QuantileParams) withDefaults() QuantileParams {
	p.RelativeAccuracy = cmp.Or(p.RelativeAccuracy, 0.01)
	p.MaxBuckets = cmp.Or(p.MaxBuckets, 2048)
	return p
}

// Validate reports every problem with p at once, each wrapping
// ErrInvalidSpec.
func (p QuantileParams) Validate() error {
	p = p.withDefaults()
	e := check.For("sketch.QuantileParams")
	if !(p.RelativeAccuracy >= 1e-4 && p.RelativeAccuracy <= 0.5) {
		e.Check(false, "RelativeAccuracy", "%v must be in [1e-4, 0.5]", p.RelativeAccuracy)
	}
	if p.MaxBuckets < 16 || p.MaxBuckets > 1<<16 {
		e.Check(false, "MaxBuckets", "%d must be in [16, 65536]", p.MaxBuckets)
	}
	return e.Err()
}

// Quantile is a relative-error quantile summary of float64 values,
// positive, negative and zero. A value x > 0 goes to bucket
// i = ceil(log_gamma x), gamma = (1+alpha)/(1-alpha), covering
// (gamma^(i-1), gamma^i] and represented by 2*gamma^i/(gamma+1); negative
// values use a mirrored store of |x|; zero has its own count.
//
// Value(q) returns the estimate of the value of 0-based rank
// floor(q*(n-1)) in sorted order (1-based floor(1+q(n-1)), the paper's
// convention), within alpha relative error, clamped to the exact [min, max]
// seen. Add and Merge commute (bucket counts add), so the state is
// independent of arrival order. Cost: Add O(1) (one logarithm), Value
// O(buckets), memory 8 bytes per bucket between the smallest and largest
// index. Not safe for concurrent use.
type Quantile struct {
	params     QuantileParams
	gamma, lnG float64
	pos, neg   qstore
	zero, n    uint64
	minV, maxV float64
}

// qstore counts buckets [off, off+len(counts)). Invariant:
// len(counts) <= MaxBuckets, and counts[0] and counts[len-1] are nonzero
// unless empty.
type qstore struct {
	off    int32
	counts []uint64
}

// NewQuantile returns an empty summary, or an error wrapping
// ErrInvalidSpec.
func NewQuantile(p QuantileParams) (*Quantile, error) {
	if err := p.Validate(); err != nil {
		return nil, err
	}
	p = p.withDefaults()
	g := (1 + p.RelativeAccuracy) / (1 - p.RelativeAccuracy)
	return &Quantile{params: p, gamma: g, lnG: math.Log(g)}, nil
}

// Params returns the parameters with defaults applied.
func (s *Quantile) Params() QuantileParams { return s.params }

// RelativeError returns alpha.
func (s *Quantile) RelativeError() float64 { return s.params.RelativeAccuracy }

// Count returns the number of values added.
func (s *Quantile) Count() uint64 { return s.n }

func (s *Quantile) index(x float64) int32 { return int32(math.Ceil(math.Log(x) / s.lnG)) }

func (s *Quantile) value(i int32) float64 {
	return 2 * math.Exp(float64(i)*s.lnG) / (s.gamma + 1)
}

func (q *qstore) add(i int32, c uint64, maxB int) {
	if len(q.counts) == 0 {
		q.off = i
		q.counts = append(q.counts[:0], c)
		return
	}
	hi := q.off + int32(len(q.counts)) - 1
	switch {
	case i > hi:
		q.counts = append(q.counts, make([]uint64, i-hi)...)
		q.counts[len(q.counts)-1] = c
	case i < q.off:
		grown := make([]uint64, int(q.off-i)+len(q.counts))
		copy(grown[q.off-i:], q.counts)
		grown[0] = c
		q.counts, q.off = grown, i
	default:
		q.counts[i-q.off] = sat.AddU64(q.counts[i-q.off], c)
	}
	q.collapse(maxB)
}

// collapse folds the buckets of smallest magnitude into the lowest kept
// one so that at most maxB remain. The result depends only on the largest
// index seen, so it does not depend on the order of adds.
func (q *qstore) collapse(maxB int) {
	if len(q.counts) <= maxB {
		return
	}
	cut := len(q.counts) - maxB
	var sum uint64
	for _, c := range q.counts[:cut+1] {
		sum = sat.AddU64(sum, c)
	}
	q.counts = append(q.counts[:0], q.counts[cut:]...)
	q.counts[0] = sum
	q.off += int32(cut)
}

func (q *qstore) total() uint64 {
	var s uint64
	for _, c := range q.counts {
		s = sat.AddU64(s, c)
	}
	return s
}

// Add records x. NaN and ±Inf are rejected (false, nothing changes).
func (s *Quantile) Add(x float64) bool {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return false
	}
	switch {
	case x > 0:
		s.pos.add(s.index(x), 1, s.params.MaxBuckets)
	case x < 0:
		s.neg.add(s.index(-x), 1, s.params.MaxBuckets)
	default:
		s.zero++
	}
	if s.n == 0 || x < s.minV {
		s.minV = x
	}
	if s.n == 0 || x > s.maxV {
		s.maxV = x
	}
	s.n++
	return true
}

// Value returns the estimate of the q-quantile (see Quantile for the
// rank convention), or false if the summary is empty or q is outside
// [0, 1].
func (s *Quantile) Value(q float64) (float64, bool) {
	if s.n == 0 || !(q >= 0 && q <= 1) {
		return 0, false
	}
	rank := uint64(q * float64(s.n-1))
	var v float64
	var seen uint64
	found := false
	for i := len(s.neg.counts) - 1; i >= 0 && !found; i-- {
		if seen += s.neg.counts[i]; seen > rank {
			v, found = -s.value(s.neg.off+int32(i)), true
		}
	}
	if !found {
		if seen += s.zero; seen > rank {
			v, found = 0, true
		}
	}
	for i := 0; i < len(s.pos.counts) && !found; i++ {
		if seen += s.pos.counts[i]; seen > rank {
			v, found = s.value(s.pos.off+int32(i)), true
		}
	}
	if !found {
		v = s.maxV
	}
	return min(max(v, s.minV), s.maxV), true
}

// Min and Max return the exact extremes (0 when empty).
func (s *Quantile) Min() float64 { return s.minV }

// Max returns the largest value added (0 when empty).
func (s *Quantile) Max() float64 { return s.maxV }

// Merge adds o's bucket counts to s. Parameters must be equal
// (ErrIncompatible otherwise, s unchanged).
func (s *Quantile) Merge(o *Quantile) error {
	if s.params != o.params {
		return fmt.Errorf("quantile merge: %+v vs %+v: %w", s.params, o.params, ErrIncompatible)
	}
	if o.n == 0 {
		return nil
	}
	for i, c := range o.pos.counts {
		if c != 0 {
			s.pos.add(o.pos.off+int32(i), c, s.params.MaxBuckets)
		}
	}
	for i, c := range o.neg.counts {
		if c != 0 {
			s.neg.add(o.neg.off+int32(i), c, s.params.MaxBuckets)
		}
	}
	if s.n == 0 || o.minV < s.minV {
		s.minV = o.minV
	}
	if s.n == 0 || o.maxV > s.maxV {
		s.maxV = o.maxV
	}
	s.zero = sat.AddU64(s.zero, o.zero)
	s.n = sat.AddU64(s.n, o.n)
	return nil
}

// Reset empties the summary.
func (s *Quantile) Reset() {
	s.pos.counts, s.neg.counts = s.pos.counts[:0], s.neg.counts[:0]
	s.zero, s.n, s.minV, s.maxV = 0, 0, 0, 0
}

// SizeBytes approximates the heap footprint in bytes.
func (s *Quantile) SizeBytes() int { return 128 + 8*(cap(s.pos.counts)+cap(s.neg.counts)) }

func appendQStore(dst []byte, q *qstore) []byte {
	nz := 0
	for _, c := range q.counts {
		if c != 0 {
			nz++
		}
	}
	dst = binary.AppendUvarint(dst, uint64(nz))
	if nz == 0 {
		return dst
	}
	dst = binary.AppendVarint(dst, int64(q.off))
	prev := q.off
	for i, c := range q.counts {
		if c == 0 {
			continue
		}
		dst = binary.AppendUvarint(dst, uint64(q.off+int32(i)-prev))
		dst = binary.AppendUvarint(dst, c)
		prev = q.off + int32(i)
	}
	return dst
}

// AppendBinary appends the encoding of s (see UnmarshalBinary).
func (s *Quantile) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, formatVersion1, kindQuantile)
	dst = appendU64(dst, math.Float64bits(s.params.RelativeAccuracy))
	dst = binary.AppendUvarint(dst, uint64(s.params.MaxBuckets))
	dst = binary.AppendUvarint(dst, s.n)
	if s.n == 0 {
		return dst, nil
	}
	dst = appendU64(dst, math.Float64bits(s.minV))
	dst = appendU64(dst, math.Float64bits(s.maxV))
	dst = binary.AppendUvarint(dst, s.zero)
	dst = appendQStore(dst, &s.pos)
	return appendQStore(dst, &s.neg), nil
}

// UnmarshalBinary replaces s with the decoded summary. On error s is
// unchanged.
//
// Version 1 layout:
//
//	byte     version = 1 (ErrUnknownVersion otherwise)
//	byte     kind = 4 (quantiles)
//	8 bytes  RelativeAccuracy, IEEE 754 big endian
//	uvarint  MaxBuckets (the two must Validate)
//	uvarint  n, the number of values; if n = 0 the encoding ends here
//	8 bytes  min, 8 bytes max: finite, min <= max
//	uvarint  zero count
//	store of positive values, then store of negative values (by |x|):
//	  uvarint k nonzero buckets; if k > 0: varint first index, then k times
//	  uvarint gap from the previous index (0 for the first, >= 1 after)
//	  and uvarint count (>= 1); the index span is at most MaxBuckets and
//	  the indices fit an int32.
//
// The zero count and all bucket counts sum to n. gamma is
// (1+RelativeAccuracy)/(1-RelativeAccuracy). Trailing bytes return
// ErrTrailingBytes; anything else malformed ErrCorrupt.
func (s *Quantile) UnmarshalBinary(b []byte) error { return named("quantile", s.unmarshal(b)) }

func (s *Quantile) unmarshal(b []byte) error {
	r := header(&wire.Decoder{B: b}, kindQuantile)
	if r.Err != nil {
		return r.Err
	}
	p := QuantileParams{RelativeAccuracy: r.Float64BE(), MaxBuckets: int(min(r.Uvarint(), 1<<20))}
	n := r.Uvarint()
	if r.Err != nil {
		return r.Err
	}
	if p.RelativeAccuracy == 0 || p.MaxBuckets == 0 || p.Validate() != nil {
		return corruptf("parameters %+v", p)
	}
	ns, _ := NewQuantile(p)
	ns.n = n
	if n > 0 {
		ns.minV, ns.maxV = r.Float64BE(), r.Float64BE()
		ns.zero = r.Uvarint()
		if r.Err == nil && (math.IsNaN(ns.minV) || math.IsInf(ns.minV, 0) || math.IsNaN(ns.maxV) ||
			math.IsInf(ns.maxV, 0) || ns.minV > ns.maxV) {
			r.Fail("min %v max %v", ns.minV, ns.maxV)
		}
		readQStore(r, &ns.pos, p.MaxBuckets)
		readQStore(r, &ns.neg, p.MaxBuckets)
	}
	if err := r.Finish(); err != nil {
		return err
	}
	if sum := sat.AddU64(sat.AddU64(ns.pos.total(), ns.neg.total()), ns.zero); sum != n {
		return corruptf("counts sum to %d, n = %d", sum, n)
	}
	*s = *ns
	return nil
}

func readQStore(r *wire.Decoder, q *qstore, maxB int) {
	k := r.Count(2, uint64(maxB))
	if k == 0 || r.Err != nil {
		return
	}
	first := r.Varint()
	if r.Err == nil && (first < math.MinInt32 || first > math.MaxInt32-int64(maxB)) {
		r.Fail("first index %d", first)
	}
	idx := first
	for i := range k {
		gap := r.Uvarint()
		c := r.Uvarint()
		if r.Err != nil {
			return
		}
		if (i == 0) != (gap == 0) || c == 0 || gap > uint64(maxB) {
			r.Fail("bucket %d: gap %d count %d", i, gap, c)
			return
		}
		idx += int64(gap)
		if idx-first >= int64(maxB) {
			r.Fail("bucket span exceeds %d", maxB)
			return
		}
		if i == 0 {
			q.off = int32(first)
			q.counts = make([]uint64, 0, 8)
		}
		for int64(len(q.counts)) < idx-first {
			q.counts = append(q.counts, 0)
		}
		q.counts = append(q.counts, c)
	}
}
