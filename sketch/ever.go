package sketch

import (
	"cmp"
	"encoding/binary"
	"fmt"
	"github.com/tallyward/tallyward/internal/check"
	"math"
	"math/bits"
	"slices"
	"time"

	"github.com/axiomhq/hyperloglog"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
)

// DistinctEverSpec shapes a distinct count over an entity's whole history
// (no window). The zero value of each field means its default.
type DistinctEverSpec struct {
	// Precision p: 2^p one-byte registers once the set is large; relative
	// standard error 1.04/sqrt(2^p). Range 4..18. Default 12 (1.625%).
	Precision uint8
	// Horizon is how far behind the newest added time as-of queries stay
	// exact: items added within it are kept with their times until the
	// newest time moves past them. The pipeline passes its allowed
	// disorder. Range [0, 2^61 ns]. Default 0.
	Horizon time.Duration
}

const defaultEverPrecision = 12

func (s DistinctEverSpec) withDefaults() DistinctEverSpec {
	s.Precision = cmp.Or(s.Precision, defaultEverPrecision)
	return s
}

// Validate reports every problem with s at once, each wrapping
// ErrInvalidSpec. Zero fields are valid (they mean the default).
func (s DistinctEverSpec) Validate() error {
	s = s.withDefaults()
	e := check.For("sketch.DistinctEverSpec")
	if s.Precision < 4 || s.Precision > 18 {
		e.Check(false, "Precision", "%d must be in [4, 18]", s.Precision)
	}
	if s.Horizon < 0 || s.Horizon > maxSpecDuration {
		e.Check(false, "Horizon", "%d must be in [0, 2^61]", s.Horizon)
	}
	return e.Err()
}

// DistinctEver counts the distinct items (64-bit hashes) an entity has
// ever had: distinct devices ever seen for an account, distinct cards ever
// used from an address. It has no window; items never leave.
//
// It is backed by github.com/axiomhq/hyperloglog with its sparse
// representation (Heule, Nunkesser, Hall, "HyperLogLog in practice",
// EDBT 2013: 25-bit sparse indices, near-exact while the set is small;
// the library's estimate) and, once the sparse form outgrows 2^p bytes,
// the library's 2^p dense registers, estimated from a histogram of their
// values by Ertl's improved raw estimator (O(64), where the library's own
// dense estimate costs a math.Pow per register), with relative standard
// error 1.04/sqrt(2^p) (Flajolet, Fusy, Gandouet, Meunier, AofA 2007).
//
// As of t: items added at times <= Newest()-Horizon are folded into the
// sketch; newer ones are kept with their times. DistinctAt(t) counts the
// folded items and the kept items with time <= t, so for t >=
// Newest()-Horizon it never counts an item newer than t. For an older t
// (outside the contract, as for Distinct) it also counts folded items
// newer than t.
//
// Order: the state is a function of the sequence of adds (queries never
// change it), and the estimate of the sketch does not depend on the order
// of the folded items except at the sparse-to-dense switch, whose moment
// depends on the add sequence. Apply items in a canonical order for
// bit-identical results, as the pipeline does.
//
// Items within the horizon are kept once each, with their earliest time.
//
// Cost: Add amortised O(1) plus a scan of the kept items; memory a few
// bytes per distinct item while sparse, then 2·2^p bytes (the library's
// registers and a copy with its histogram). DistinctAt: dense, O(64 + kept
// items at or before t); sparse, a copy of the sparse form plus the kept
// items (O(its size + kept items)) when either changed since the last
// query, else a cached answer. Measured per add+query (BenchmarkDistinctEver,
// p=12, 5 s horizon, 100 events/s, 2 shared cores): about 0.8 us at 10
// items, 6 us at 100k (dense), and about 110 us for a sparse set taking a
// new item every event (500 new items kept), against 2, 460 and 205 us
// for the library's insert-then-Estimate. Not safe for concurrent use.
type DistinctEver struct {
	spec   DistinctEverSpec // defaults applied
	hll    *hyperloglog.Sketch
	dense  bool    // the library switched to dense registers (as last seen)
	regs   []uint8 // dense: a copy of the library's registers
	hist   [66]uint32
	folded uint64 // items inserted into hll

	// Invariant: sorted by t, ties in add order; every t > newest-Horizon;
	// no hash twice (each item at its earliest time).
	tail   []everItem
	newest int64
	has    bool
	count  uint64 // events added (saturating)

	estOK   bool
	est     uint64
	scratch []byte
	raised  []uint32
}

type everItem struct {
	t int64
	h uint64
}

// NewDistinctEver returns an empty count, or an error wrapping
// ErrInvalidSpec.
func NewDistinctEver(spec DistinctEverSpec) (*DistinctEver, error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	spec = spec.withDefaults()
	d := &DistinctEver{spec: spec}
	d.Reset()
	return d, nil
}

// Reset empties the count, keeping its spec.
func (d *DistinctEver) Reset() {
	hll, err := hyperloglog.NewSketch(d.spec.Precision, true)
	if err != nil {
		panic(err) // unreachable: the precision was validated
	}
	*d = DistinctEver{spec: d.spec, hll: hll, tail: d.tail[:0], scratch: d.scratch[:0], raised: d.raised[:0]}
}

// Spec returns the spec with defaults applied.
func (d *DistinctEver) Spec() DistinctEverSpec { return d.spec }

// Newest returns the largest time added, and false if nothing was.
func (d *DistinctEver) Newest() (int64, bool) { return d.newest, d.has }

// Count returns the number of events added (not the distinct count),
// saturating at 2^64-1.
func (d *DistinctEver) Count() uint64 { return d.count }

// RelativeError returns 1.04/sqrt(2^p), the relative standard error once
// dense; while sparse the error is far smaller.
func (d *DistinctEver) RelativeError() float64 {
	return 1.04 / math.Sqrt(float64(uint64(1)<<d.spec.Precision))
}

func (d *DistinctEver) cut() int64 { return sat.Sub(d.newest, int64(d.spec.Horizon)) }

// Add records item h at time t. It always accepts (items never expire)
// and returns true.
func (d *DistinctEver) Add(t int64, h uint64) bool {
	d.count = sat.AddU64(d.count, 1)
	if !d.has || t > d.newest {
		d.newest, d.has = t, true
		c := d.cut()
		k := 0
		for k < len(d.tail) && d.tail[k].t <= c {
			d.insert(d.tail[k].h)
			k++
		}
		d.tail = append(d.tail[:0], d.tail[k:]...)
	}
	if t <= d.cut() {
		d.insert(h)
		return true
	}
	for k, e := range d.tail {
		if e.h == h {
			if e.t <= t {
				return true // kept already, at an earlier time
			}
			d.tail = slices.Delete(d.tail, k, k+1)
			break
		}
	}
	i := d.upTo(t)
	d.tail = slices.Insert(d.tail, i, everItem{t, h})
	d.estOK = d.estOK && d.dense // sparse: the cached answer covered the old kept items
	return true
}

// upTo returns the number of kept items with time <= t.
func (d *DistinctEver) upTo(t int64) int {
	i, _ := slices.BinarySearchFunc(d.tail, t, func(e everItem, t int64) int {
		if e.t <= t {
			return -1
		}
		return 1
	})
	return i
}

// register returns the dense register index and rank of hash h, as the
// library computes them: the top p bits, and one plus the leading zeros of
// the rest.
func register(h uint64, p uint8) (uint32, uint8) {
	return uint32(h >> (64 - p)), uint8(bits.LeadingZeros64(h<<p|1<<(p-1))) + 1
}

func (d *DistinctEver) insert(h uint64) {
	d.hll.InsertHash(h)
	d.folded++
	if d.dense {
		i, r := register(h, d.spec.Precision)
		if r <= d.regs[i] {
			return // no register changed: the estimate stands
		}
		d.hist[d.regs[i]]--
		d.hist[r]++
		d.regs[i] = r
	}
	d.estOK = false
}

// setDense copies the library's dense registers and counts their values.
func (d *DistinctEver) setDense(regs []uint8) {
	d.dense = true
	d.regs = append(d.regs[:0], regs...)
	d.hist = [66]uint32{}
	for _, r := range d.regs {
		d.hist[r]++
	}
}

func (d *DistinctEver) denseEstimate(hist *[66]uint32) uint64 {
	p := d.spec.Precision
	return uint64(ertlRaw(hist[:], p, 64-int(p)) + 0.5)
}

// encodeHLL appends the library's encoding with the sparse tmp-set keys
// sorted, so that equal states encode to equal bytes (the library writes
// them in map order).
func encodeHLL(dst []byte, s *hyperloglog.Sketch) ([]byte, error) {
	start := len(dst)
	dst, err := s.AppendBinary(dst)
	if err != nil {
		return dst, err
	}
	b := dst[start:]
	if len(b) >= 8 && b[3] == 1 {
		n := int(binary.BigEndian.Uint32(b[4:8]))
		keys := make([]uint32, n)
		for i := range keys {
			keys[i] = binary.BigEndian.Uint32(b[8+4*i:])
		}
		slices.Sort(keys)
		for i, k := range keys {
			binary.BigEndian.PutUint32(b[8+4*i:], k)
		}
	}
	return dst, nil
}

// base returns the estimate of the folded items (dense) or of the folded
// and all kept items (sparse), cached until an add changes it.
func (d *DistinctEver) base() uint64 {
	if d.estOK {
		return d.est
	}
	if !d.dense {
		// Learn whether the library went dense, from its header byte 3.
		b, err := d.hll.AppendBinary(d.scratch[:0])
		d.scratch = b
		if err == nil && len(b) >= 8 && b[3] == 0 {
			d.setDense(b[8:])
		}
	}
	if d.dense {
		d.est = d.denseEstimate(&d.hist)
	} else {
		// A sparse Estimate compacts the sketch: estimate a copy, so that
		// queries never change the state.
		c := d.hll.Clone()
		for _, e := range d.tail {
			c.InsertHash(e.h)
		}
		d.est = c.Estimate()
	}
	d.estOK = true
	return d.est
}

// DistinctAt returns the estimated number of distinct items added with
// time <= t (see DistinctEver for t older than Newest()-Horizon).
func (d *DistinctEver) DistinctAt(t int64) uint64 {
	if !d.has {
		return 0
	}
	n := d.upTo(t)
	base := d.base()
	if !d.dense {
		if n == len(d.tail) {
			return base // the cached answer covers every kept item
		}
		c := d.hll.Clone()
		for _, e := range d.tail[:n] {
			c.InsertHash(e.h)
		}
		return c.Estimate()
	}
	// Dense: raise, on a copy of the histogram, the registers the kept
	// items at or before t raise (each register to its largest rank).
	p := d.spec.Precision
	raised := d.raised[:0]
	for _, e := range d.tail[:n] {
		if i, r := register(e.h, p); r > d.regs[i] {
			raised = append(raised, i<<8|uint32(r))
		}
	}
	d.raised = raised
	if len(raised) == 0 {
		return base
	}
	slices.Sort(raised)
	hist := d.hist
	for k, x := range raised {
		if k+1 < len(raised) && raised[k+1]>>8 == x>>8 {
			continue // a larger rank of the same register follows
		}
		hist[d.regs[x>>8]]--
		hist[x&0xff]++
	}
	return d.denseEstimate(&hist)
}

// SizeBytes approximates the heap footprint in bytes.
func (d *DistinctEver) SizeBytes() int {
	n := 160 + 16*cap(d.tail) + cap(d.regs) + cap(d.scratch)
	if d.dense {
		return n + 1<<d.spec.Precision
	}
	// Sparse: a 4-byte tmp-set key or one to three list bytes per item.
	return n + 4*int(min(d.folded, uint64(1)<<d.spec.Precision))
}

// AppendBinary appends the encoding of d (see UnmarshalBinary).
func (d *DistinctEver) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, formatVersion1, kindDistinctEver, d.spec.Precision)
	dst = binary.AppendUvarint(dst, uint64(d.spec.Horizon))
	if !d.has {
		return append(dst, 0), nil
	}
	dst = append(dst, flagHasNewest)
	dst = binary.AppendVarint(dst, d.newest)
	dst = binary.AppendUvarint(dst, d.count)
	dst = binary.AppendUvarint(dst, uint64(len(d.tail)))
	for _, e := range d.tail {
		dst = binary.AppendUvarint(dst, uint64(d.newest-e.t))
		dst = appendU64(dst, e.h)
	}
	return wire.AppendFramed(dst, func(dst []byte) ([]byte, error) { return encodeHLL(dst, d.hll) })
}

// UnmarshalBinary replaces d with the decoded count, spec included. On
// error d is unchanged.
//
// Version 1 layout:
//
//	byte     version = 1 (ErrUnknownVersion otherwise)
//	byte     kind = 5 (distinct-ever)
//	byte     Precision (4..18)
//	uvarint  Horizon in ns (at most 2^61)
//	byte     flags: bit 0 = some item was added; other bits zero. Without
//	         bit 0 the encoding ends here.
//	varint   newest time added
//	uvarint  number of events added
//	uvarint  n kept items, oldest first, then n times:
//	uvarint  newest - time, below Horizon, non-increasing
//	8 bytes  item hash, big endian: the 64-bit hash the caller added (Hash
//	         gives XXH64 seed 0; a pipeline may key its own); no hash twice
//	         (each kept item at its earliest time)
//	uvarint  n, then n bytes: the folded items, in
//	         github.com/axiomhq/hyperloglog v0.3.0's encoding, version 2
//	         only (its UnmarshalBinary documents it), at the same
//	         precision, with the sparse tmp-set keys in ascending order.
//	         Item hashes enter it through InsertHash, so the library's own
//	         item hash plays no part.
//	then end of input (else ErrTrailingBytes).
//
// Anything malformed, inside the library's part too, is ErrCorrupt.
func (d *DistinctEver) UnmarshalBinary(b []byte) error {
	return named("distinct-ever", d.unmarshal(b))
}

func (d *DistinctEver) unmarshal(b []byte) error {
	r := header(&wire.Decoder{B: b}, kindDistinctEver)
	var s DistinctEverSpec
	s.Precision = r.Byte()
	s.Horizon = time.Duration(min(r.Uvarint(), 1<<62))
	flags := r.Byte()
	if r.Err != nil {
		return r.Err
	}
	if s.Precision == 0 || s.Validate() != nil {
		return corruptf("spec %+v", s)
	}
	nd, _ := NewDistinctEver(s)
	if flags&^flagHasNewest != 0 {
		return corruptf("flags %#x", flags)
	}
	if flags == 0 {
		if err := r.Finish(); err != nil {
			return err
		}
		*d = *nd
		return nil
	}
	nd.has = true
	nd.newest = r.Varint()
	nd.count = r.Uvarint()
	n := r.Count(9, math.MaxUint64)
	prevAge := uint64(math.MaxUint64)
	for i := range n {
		age := r.Uvarint()
		h := r.Uint64BE()
		if r.Err != nil {
			return r.Err
		}
		if age >= uint64(s.Horizon) || age > prevAge || age > uint64(nd.newest)+1<<63 {
			return corruptf("kept item %d: age %d", i, age)
		}
		prevAge = age
		nd.tail = append(nd.tail, everItem{nd.newest - int64(age), h})
	}
	if r.Err != nil {
		return r.Err
	}
	if uint64(len(nd.tail)) > nd.count {
		return corruptf("%d kept items but %d events", len(nd.tail), nd.count)
	}
	hs := make([]uint64, len(nd.tail))
	for i, e := range nd.tail {
		hs[i] = e.h
	}
	slices.Sort(hs)
	for i := 1; i < len(hs); i++ {
		if hs[i] == hs[i-1] {
			return corruptf("item %#x kept twice", hs[i])
		}
	}
	lib := r.Bytes(r.Len())
	if err := r.Finish(); err != nil {
		return err
	}
	if len(lib) < 4 || lib[0] != 2 || lib[1] != s.Precision {
		return corruptf("folded sketch header % x", lib[:min(len(lib), 4)])
	}
	if err := nd.hll.UnmarshalBinary(lib); err != nil {
		return fmt.Errorf("%w: folded sketch: %w", ErrCorrupt, err)
	}
	if lib[3] == 0 {
		nd.setDense(lib[8:])
		nd.folded = uint64(1) << s.Precision
	} else {
		nd.folded = uint64(len(lib)) / 4
	}
	*d = *nd
	return nil
}
