package sketch

import (
	"encoding/binary"
	"fmt"
	"github.com/tallyward/tallyward/internal/check"
	"github.com/tallyward/tallyward/internal/wire"
	"math"
	"math/bits"

	"cmp"
	"github.com/tallyward/tallyward/internal/sat"
)

// CountMinParams sizes a Count-Min sketch (Cormode, Muthukrishnan, "An
// improved data stream summary: the count-min sketch and its applications",
// J. Algorithms 55(1), 2005): width ceil(e/Epsilon), depth
// ceil(ln(1/Delta)). The zero value of each field means its default.
type CountMinParams struct {
	// Epsilon bounds the overestimate as a fraction of the total count N:
	// Estimate(x) <= f(x) + Epsilon*N with probability >= 1-Delta. Range
	// [1e-6, 1), and width*depth at most 2^22. Default 0.01 (width 272).
	Epsilon float64
	// Delta is the probability that the Epsilon bound fails for one query.
	// Range [1e-12, 1). Default 0.01.
	Delta float64
}

// maxCountMinCells caps width*depth (32 MiB of counters).
const maxCountMinCells = 1 << 22

func (p CountMinParams) withDefaults() CountMinParams {
	p.Epsilon = cmp.Or(p.Epsilon, 0.01)
	p.Delta = cmp.Or(p.Delta, 0.01)
	return p
}

// Validate reports every problem with p at once, each wrapping
// ErrInvalidSpec.
func (p CountMinParams) Validate() error {
	p = p.withDefaults()
	e := check.For("sketch.CountMinParams")
	if !(p.Epsilon >= 1e-6 && p.Epsilon < 1) {
		e.Check(false, "Epsilon", "%v must be in [1e-6, 1)", p.Epsilon)
	}
	if !(p.Delta >= 1e-12 && p.Delta < 1) {
		e.Check(false, "Delta", "%v must be in [1e-12, 1)", p.Delta)
	}
	if e.Err() == nil {
		if w, d := p.Dims(); w*d > maxCountMinCells {
			e.Check(false, "Epsilon", "with Delta gives width %d * depth %d, over %d cells", w, d, maxCountMinCells)
		}
	}
	return e.Err()
}

// Dims returns the width and depth the parameters imply (defaults applied).
func (p CountMinParams) Dims() (width, depth int) {
	p = p.withDefaults()
	return int(math.Ceil(math.E / p.Epsilon)), int(math.Ceil(math.Log(1 / p.Delta)))
}

// CountMin estimates item frequencies. It never underestimates; it
// overestimates by at most Epsilon*N with probability at least 1-Delta per
// query. Add and Merge commute, so the state is independent of arrival
// order. Cost: Add and Estimate O(depth), memory 8*width*depth bytes. Not
// safe for concurrent use.
//
// Rows hash an item as mix64(h + rowSeed) reduced to the width by a
// multiply-shift; that the rows behave as independent hashes is common
// practice, not the pairwise-independent family of the paper.
type CountMin struct {
	params CountMinParams // defaults applied
	w, d   int
	n      uint64
	cells  []uint64 // row-major, d rows of w
}

// NewCountMin returns an empty sketch, or an error wrapping ErrInvalidSpec.
func NewCountMin(p CountMinParams) (*CountMin, error) {
	if err := p.Validate(); err != nil {
		return nil, err
	}
	p = p.withDefaults()
	w, d := p.Dims()
	return &CountMin{params: p, w: w, d: d, cells: make([]uint64, w*d)}, nil
}

// Params returns the parameters with defaults applied.
func (c *CountMin) Params() CountMinParams { return c.params }

func rowSeed(i int) uint64 { return uint64(i+1) * 0x9e3779b97f4a7c15 }

func (c *CountMin) col(h uint64, i int) int {
	hi, _ := bits.Mul64(mix64(h+rowSeed(i)), uint64(c.w))
	return int(hi)
}

// Add counts item h n more times (saturating at 2^64-1).
func (c *CountMin) Add(h uint64, n uint64) {
	c.n = sat.AddU64(c.n, n)
	for i := range c.d {
		k := i*c.w + c.col(h, i)
		c.cells[k] = sat.AddU64(c.cells[k], n)
	}
}

// Estimate returns the minimum over rows of item h's cell: never below the
// true count.
func (c *CountMin) Estimate(h uint64) uint64 {
	est := uint64(math.MaxUint64)
	for i := range c.d {
		est = min(est, c.cells[i*c.w+c.col(h, i)])
	}
	return est
}

// Count returns N, the sum of all counts added.
func (c *CountMin) Count() uint64 { return c.n }

// ErrorBound returns Epsilon*N: the overestimate bound that holds per query
// with probability at least 1-Delta.
func (c *CountMin) ErrorBound() float64 { return c.params.Epsilon * float64(c.n) }

// Merge adds o's counts cell by cell. The parameters must be equal
// (ErrIncompatible otherwise, c unchanged).
func (c *CountMin) Merge(o *CountMin) error {
	if c.params != o.params {
		return fmt.Errorf("count-min merge: %+v vs %+v: %w", c.params, o.params, ErrIncompatible)
	}
	c.n = sat.AddU64(c.n, o.n)
	for i, v := range o.cells {
		c.cells[i] = sat.AddU64(c.cells[i], v)
	}
	return nil
}

// Reset zeroes every count.
func (c *CountMin) Reset() {
	clear(c.cells)
	c.n = 0
}

// SizeBytes approximates the heap footprint in bytes.
func (c *CountMin) SizeBytes() int { return 64 + 8*len(c.cells) }

// AppendBinary appends the encoding of c (see UnmarshalBinary).
func (c *CountMin) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, formatVersion1, kindCountMin)
	dst = appendU64(dst, math.Float64bits(c.params.Epsilon))
	dst = appendU64(dst, math.Float64bits(c.params.Delta))
	dst = binary.AppendUvarint(dst, c.n)
	zeros := 0
	for _, v := range c.cells {
		if v == 0 {
			zeros++
			continue
		}
		dst = binary.AppendUvarint(dst, uint64(zeros))
		dst = binary.AppendUvarint(dst, v)
		zeros = 0
	}
	return binary.AppendUvarint(dst, uint64(zeros)), nil
}

// UnmarshalBinary replaces c with the decoded sketch. On error c is
// unchanged.
//
// Version 1 layout:
//
//	byte     version = 1 (ErrUnknownVersion otherwise)
//	byte     kind = 2 (Count-Min)
//	8 bytes  Epsilon, IEEE 754 big endian; 8 bytes Delta (must Validate)
//	uvarint  N, the total count
//	cells, row-major over depth rows of width cells, as runs: uvarint z
//	         (z zero cells); if the cells are not yet exhausted, uvarint v
//	         (one cell, v >= 1); repeat. The last run ends exactly at the
//	         last cell. Unless N = 2^64-1 (saturated) every row sums to N.
//
// Row hashing is fixed by the version (mix64 of the item hash plus seed
// (i+1)*0x9e3779b97f4a7c15, multiply-shift to the width); item hashes are
// XXH64 with seed 0. Trailing bytes return ErrTrailingBytes; anything else
// malformed ErrCorrupt.
func (c *CountMin) UnmarshalBinary(b []byte) error { return named("count-min", c.unmarshal(b)) }

// CountMinParamsOf reads the parameters of an encoded Count-Min sketch
// without decoding its cells. A caller that expects given parameters
// checks them first: the cells are allocated from the parameters
// (width × depth counters, up to 32 MiB), so a damaged or foreign blob
// would otherwise cost that allocation before it is refused.
func CountMinParamsOf(b []byte) (CountMinParams, error) {
	r := header(&wire.Decoder{B: b}, kindCountMin)
	p := CountMinParams{Epsilon: r.Float64BE(), Delta: r.Float64BE()}
	if r.Err != nil {
		return CountMinParams{}, named("count-min", r.Err)
	}
	return p, nil
}

func (c *CountMin) unmarshal(b []byte) error {
	r := header(&wire.Decoder{B: b}, kindCountMin)
	if r.Err != nil {
		return r.Err
	}
	p := CountMinParams{Epsilon: r.Float64BE(), Delta: r.Float64BE()}
	n := r.Uvarint()
	if r.Err != nil {
		return r.Err
	}
	if p.Epsilon == 0 || p.Delta == 0 || p.Validate() != nil {
		return corruptf("parameters %+v", p)
	}
	nc, err := NewCountMin(p)
	if err != nil {
		return corruptf("%v", err)
	}
	nc.n = n
	pos := 0
	for r.Err == nil {
		z := r.Uvarint()
		if z > uint64(len(nc.cells)-pos) {
			r.Fail("zero run %d past the last cell", z)
			break
		}
		pos += int(z)
		if pos == len(nc.cells) {
			break
		}
		v := r.Uvarint()
		if r.Err == nil && v == 0 {
			r.Fail("zero cell value")
		}
		nc.cells[pos] = v
		pos++
	}
	if err := r.Finish(); err != nil {
		return err
	}
	if n != math.MaxUint64 {
		for i := range nc.d {
			var sum uint64
			for _, v := range nc.cells[i*nc.w : (i+1)*nc.w] {
				sum = sat.AddU64(sum, v)
			}
			if sum != n {
				return corruptf("row %d sums to %d, N = %d", i, sum, n)
			}
		}
	}
	*c = *nc
	return nil
}
