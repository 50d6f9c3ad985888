package sketch

import (
	"cmp"
	"github.com/tallyward/tallyward/internal/check"
	"math"
	"slices"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
)

// DistinctSpec shapes a windowed distinct count. The zero value of each
// optional field means its default.
type DistinctSpec struct {
	// Window is the counted interval: a query at t counts the
	// Window/Resolution most recent panes up to and including pane(t), the
	// newest one cut at t. Must be a positive multiple of Resolution and at
	// most 2^61. Required; no default.
	Window time.Duration
	// Resolution is the pane width; pane(t) = floor(t /
	// Resolution), aligned to the Unix epoch. The trailing edge of a query's
	// window is exact to one pane (see Distinct). Required; no default.
	Resolution time.Duration
	// Horizon is how far behind the newest added time adds and as-of queries
	// stay exact: the pipeline passes its allowed disorder.
	// Window/Resolution + ceil(Horizon/Resolution) + 1 must not exceed 512.
	// Default 0.
	Horizon time.Duration
	// Precision p gives 2^p HyperLogLog registers once the exact set is
	// exceeded; relative standard error 1.04/sqrt(2^p). Range 4..18.
	// Default 12 (1.625%).
	Precision uint8
	// ExactLimit is the number of distinct items kept exactly (with exact
	// times) before the summary switches to sliding registers. Range
	// 1..4096. Default 128.
	ExactLimit int
}

const (
	defaultDistinctPrecision = 12
	defaultExactLimit        = 128
	maxExactLimit            = 4096
	maxSpecDuration          = time.Duration(1) << 61
	// Times outside [minTime, maxTime] are rejected by Add and answered 0
	// by DistinctAt, so pane arithmetic cannot overflow.
	minTime = -(int64(1) << 62)
	maxTime = int64(1) << 62
)

// withDefaults returns s with zero optional fields set to their defaults.
func (s DistinctSpec) withDefaults() DistinctSpec {
	s.Precision = cmp.Or(s.Precision, defaultDistinctPrecision)
	s.ExactLimit = cmp.Or(s.ExactLimit, defaultExactLimit)
	return s
}

// Validate reports every problem with s at once, joined, each wrapping
// ErrInvalidSpec. Zero optional fields are valid (they mean the default).
func (s DistinctSpec) Validate() error {
	s = s.withDefaults()
	e := check.For("sketch.DistinctSpec")
	if s.Resolution <= 0 || s.Resolution > maxSpecDuration {
		e.Check(false, "Resolution", "%d must be in [1, 2^61]", s.Resolution)
	}
	if s.Window <= 0 || s.Window > maxSpecDuration {
		e.Check(false, "Window", "%d must be in [1, 2^61]", s.Window)
	}
	if s.Horizon < 0 || s.Horizon > maxSpecDuration {
		e.Check(false, "Horizon", "%d must be in [0, 2^61]", s.Horizon)
	}
	if s.Resolution > 0 && s.Window > 0 && s.Horizon >= 0 {
		if s.Window%s.Resolution != 0 {
			e.Check(false, "Window", "%d is not a multiple of Resolution %d", s.Window, s.Resolution)
		} else if span := int64(s.Window/s.Resolution) + ceilDiv(int64(s.Horizon), int64(s.Resolution)) + 1; span > maxSpan {
			e.Check(false, "Window", "/Resolution + ceil(Horizon/Resolution) + 1 = %d exceeds %d panes", span, maxSpan)
		}
	}
	if s.Precision < 4 || s.Precision > 18 {
		e.Check(false, "Precision", "%d must be in [4, 18]", s.Precision)
	}
	if s.ExactLimit < 1 || s.ExactLimit > maxExactLimit {
		e.Check(false, "ExactLimit", "%d must be in [1, %d]", s.ExactLimit, maxExactLimit)
	}
	return e.Err()
}

func ceilDiv(a, b int64) int64 { return (a + b - 1) / b }

// Distinct is a windowed distinct count of 64-bit item hashes over event
// time.
//
// Window semantics: DistinctAt(t) counts the items added with a time τ such
// that τ <= t and pane(τ) >= pane(t) - Window/Resolution + 1. That is the
// exact window (t-Window, t] minus a piece at its trailing edge shorter than
// one pane: items in (t-Window, (pane(t)-K+1)*Resolution) are not counted,
// so the pane window never counts more than the exact one and never misses
// anything more recent than one pane's width past the exact start.
//
// Exactness: while at most ExactLimit distinct items are live, the count is
// exact (items are identified by the top 32 bits of their hash, so two live
// items collide with probability below n^2/2^33). Above it the count is a
// HyperLogLog estimate from sliding registers with relative standard error
// RelativeError(). Queries at t >= Newest()-Horizon and adds at any time
// whose pane is still retained are handled as above; items with time newer
// than t are never counted. Queries at t < Newest()-Horizon are outside the
// contract: they may miss expired items and, in sketch mode, count items of
// t's own pane newer than t.
//
// Order: see the package doc; answers are independent of arrival order
// except near the exact-to-sketch switch, which the first add that makes
// more than ExactLimit items live triggers (permanently).
//
// Cost: Add is O(ExactLimit) in exact mode (a sorted insert) and O(1)
// amortised in sketch mode; DistinctAt is O(live entries) in exact mode and
// O(entries within Horizon) plus a cached O(64) estimate in sketch mode,
// with an O(2^p) rebuild the first time a new window start is queried (once
// per pane boundary). Not safe for concurrent use, including concurrent
// queries.
type Distinct struct {
	spec   DistinctSpec // defaults applied
	k      int64        // panes per window
	has    bool
	newest int64

	// Exact mode (regs == nil). Invariant: sorted by (fp, t), at most one
	// entry per (fp, pane); nfp >= the number of distinct fp with an entry whose pane is
	// retained.
	exact []exactEntry
	nfp   int

	// Sketch mode.
	regs     *slidingRegs
	tail     []tailEntry // [tailHead:] sorted by (t, key), distinct; t > newest-Horizon
	tailHead int
	views    [3]regView
	useClock uint64
	scratch  []uint32

	// Query cache: the last answer, valid until the next mutation.
	cacheOK bool
	cacheT  int64
	cacheV  uint64
}

type exactEntry struct {
	fp uint32
	t  int64
}

type tailEntry struct {
	t   int64
	key uint32
}

// NewDistinct returns an empty windowed distinct count for spec, or an
// error wrapping ErrInvalidSpec.
func NewDistinct(spec DistinctSpec) (*Distinct, error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	spec = spec.withDefaults()
	return &Distinct{spec: spec, k: int64(spec.Window / spec.Resolution)}, nil
}

// Spec returns the spec with defaults applied.
func (d *Distinct) Spec() DistinctSpec { return d.spec }

// Newest returns the largest time added so far, and false if nothing was.
func (d *Distinct) Newest() (int64, bool) { return d.newest, d.has }

// Exact reports whether the summary is still in exact mode.
func (d *Distinct) Exact() bool { return d.regs == nil }

// RelativeError returns the relative standard error of DistinctAt: 0 while
// exact, 1.04/sqrt(2^p) once in sketch mode (Flajolet et al., AofA 2007).
// The pane trailing edge (see Distinct) is not included.
func (d *Distinct) RelativeError() float64 {
	if d.regs == nil {
		return 0
	}
	return 1.04 / math.Sqrt(float64(uint64(1)<<d.spec.Precision))
}

func (d *Distinct) res() int64 { return int64(d.spec.Resolution) }
func (d *Distinct) hor() int64 { return int64(d.spec.Horizon) }

func (d *Distinct) pane(t int64) int64 { return sat.FloorDiv(t, d.res()) }

// floorPane is the oldest pane any query at t >= newest-Horizon reads.
func (d *Distinct) floorPane() int64 {
	return d.pane(d.newest-d.hor()) - d.k + 1
}

// Add records item h at time t. It returns false, changing nothing, if t is
// outside ±2^62 or if t's pane is older than every window a query at or
// after Newest()-Horizon can read (such an add could never be counted).
func (d *Distinct) Add(t int64, h uint64) bool {
	if t < minTime || t > maxTime {
		return false
	}
	if !d.has || t > d.newest {
		d.newest, d.has = t, true
	}
	if d.pane(t) < d.floorPane() {
		return false
	}
	d.cacheOK = false
	if d.regs != nil {
		d.addSketch(t, fpKey(uint32(h>>32), d.spec.Precision))
		return true
	}
	d.addExact(exactEntry{fp: uint32(h >> 32), t: t})
	return true
}

func cmpExact(a, b exactEntry) int {
	if c := cmp.Compare(a.fp, b.fp); c != 0 {
		return c
	}
	return cmp.Compare(a.t, b.t)
}

func (d *Distinct) addExact(e exactEntry) {
	i, found := slices.BinarySearchFunc(d.exact, e, cmpExact)
	if found {
		return
	}
	// Invariant: one entry per (fp, pane), the earliest. An entry is
	// dominated by an earlier one of the same item in the same pane: any
	// query that counts the later one counts the earlier one too.
	p := d.pane(e.t)
	if i > 0 && d.exact[i-1].fp == e.fp && d.pane(d.exact[i-1].t) == p {
		return
	}
	if i < len(d.exact) && d.exact[i].fp == e.fp && d.pane(d.exact[i].t) == p {
		d.exact[i] = e
		return
	}
	newFP := (i == 0 || d.exact[i-1].fp != e.fp) && (i == len(d.exact) || d.exact[i].fp != e.fp)
	d.exact = slices.Insert(d.exact, i, e)
	if newFP {
		d.nfp++
	}
	if d.nfp > d.spec.ExactLimit || len(d.exact) > 2*d.nfp+16 {
		d.normalizeExact()
		if d.nfp > d.spec.ExactLimit {
			d.promote()
		}
	}
}

// normalizeExact drops entries no allowed query can read, rounds settled
// times (at or before newest-Horizon) down to their pane start, and keeps
// only the latest settled entry of each item. None of this changes an
// answer within the contract, so the encoding and the promotion point
// depend only on what was added.
func (d *Distinct) normalizeExact() {
	floorT := d.floorPane() * d.res()
	settled := d.newest - d.hor()
	out := d.exact[:0]
	nfp := 0
	for i := 0; i < len(d.exact); {
		fp := d.exact[i].fp
		j := i
		var best int64
		haveBest := false
		for ; j < len(d.exact) && d.exact[j].fp == fp; j++ {
			e := d.exact[j]
			if e.t < floorT {
				continue
			}
			if e.t <= settled {
				best, haveBest = d.pane(e.t)*d.res(), true
			}
		}
		start := len(out)
		if haveBest {
			out = append(out, exactEntry{fp, best})
		}
		for ; i < j; i++ {
			if e := d.exact[i]; e.t > settled && e.t >= floorT {
				out = append(out, e)
			}
		}
		if len(out) > start {
			nfp++
		}
	}
	clear(d.exact[len(out):])
	d.exact = out
	d.nfp = nfp
}

// promote moves the exact entries into sliding registers.
func (d *Distinct) promote() {
	floor := d.floorPane()
	d.regs = newSlidingRegs(d.spec.Precision, floor)
	for _, e := range d.exact {
		if d.pane(e.t) >= floor {
			d.addSketch(e.t, fpKey(e.fp, d.spec.Precision))
		}
	}
	d.exact, d.nfp = nil, 0
}

func cmpTail(a, b tailEntry) int {
	if c := cmp.Compare(a.t, b.t); c != 0 {
		return c
	}
	return cmp.Compare(a.key, b.key)
}

func (d *Distinct) addSketch(t int64, key uint32) {
	settled := d.newest - d.hor()
	if t > settled {
		i, found := slices.BinarySearchFunc(d.liveTail(), tailEntry{t, key}, cmpTail)
		if !found {
			d.tail = slices.Insert(d.tail, d.tailHead+i, tailEntry{t, key})
			d.applyViews(d.pane(t), key, true)
		}
	} else {
		d.fold(d.pane(t), key)
	}
	d.settleTail()
}

// liveTail returns the unsettled entries.
func (d *Distinct) liveTail() []tailEntry { return d.tail[d.tailHead:] }

// settleTail folds the tail entries that newest has moved past. They are
// dropped by advancing tailHead; the buffer is compacted in place once the
// dropped prefix is the larger half, so the cost is amortised O(1).
func (d *Distinct) settleTail() {
	settled := d.newest - d.hor()
	for d.tailHead < len(d.tail) && d.tail[d.tailHead].t <= settled {
		d.fold(d.pane(d.tail[d.tailHead].t), d.tail[d.tailHead].key)
		d.tailHead++
	}
	if d.tailHead > 64 && 2*d.tailHead > len(d.tail) {
		n := copy(d.tail, d.tail[d.tailHead:])
		d.tail = d.tail[:n]
		d.tailHead = 0
	}
}

// fold applies a settled (pane, key) to the registers and the cached views.
func (d *Distinct) fold(pane int64, key uint32) {
	floor := d.floorPane()
	if pane < floor {
		return
	}
	r := d.regs
	if pane-r.base > maxPaneOff {
		r.rebase(floor)
	}
	if r.insert(key>>6, pane, uint8(key&63)) {
		d.applyViews(pane, key, false)
	}
}

// applyViews raises the cached views that include (pane, key): views with
// tail include every tail entry of their window, the others only folded
// entries. Raising to a maximum is idempotent, so folding an entry that a
// tail view already holds changes nothing.
func (d *Distinct) applyViews(pane int64, key uint32, tailOnly bool) {
	j, rho := key>>6, uint8(key&63)
	for i := range d.views {
		v := &d.views[i]
		if v.valid && (v.withTail || !tailOnly) && pane >= v.start && rho > v.regs[j] {
			v.hist[v.regs[j]]--
			v.hist[rho]++
			v.regs[j] = rho
			v.estOK = false
		}
	}
}

// view returns the register view for a window starting at pane start, with
// or without every tail entry, building it (O(2^p + tail)) if no cached
// view matches.
func (d *Distinct) view(start int64, withTail bool) *regView {
	d.useClock++
	slot := 0
	for i := range d.views {
		v := &d.views[i]
		if v.valid && v.start == start && v.withTail == withTail {
			v.stamps = d.useClock
			return v
		}
		if !v.valid || v.stamps < d.views[slot].stamps {
			slot = i
		}
	}
	v := &d.views[slot]
	m := 1 << d.spec.Precision
	if len(v.regs) != m {
		v.regs = make([]uint8, m)
	}
	v.hist = [64]uint32{}
	for j := range v.regs {
		x := d.regs.valueFrom(uint32(j), start)
		v.regs[j] = x
		v.hist[x]++
	}
	v.start, v.withTail, v.valid, v.estOK, v.stamps = start, withTail, true, false, d.useClock
	if withTail {
		for _, e := range d.liveTail() {
			if d.pane(e.t) >= start {
				d.applyViews(d.pane(e.t), e.key, true)
			}
		}
	}
	return v
}

// DistinctAt returns the number of distinct items in the window ending at
// t (see Distinct for the window and the error). It never counts an item
// added with a time newer than t.
func (d *Distinct) DistinctAt(t int64) uint64 {
	if !d.has || t < minTime || t > maxTime {
		return 0
	}
	if d.cacheOK && d.cacheT == t {
		return d.cacheV
	}
	if d.regs == nil && t < d.newest-d.hor() {
		// Outside the as-of contract (t before newest-Horizon) the answer would depend on whether
		// the exact entries were compacted, which encoding does: answer
		// from the compacted form, so a summary answers the same whether
		// or not it went through AppendBinary (a cache eviction, a
		// commit) since its last add.
		d.normalizeExact()
	}
	// For the same reason a window reaching before the oldest retained
	// pane starts there: what is older is not encoded. Within the
	// contract this clamps nothing.
	start := max(d.pane(t)-d.k+1, d.floorPane())
	startT := start * d.res()
	var n uint64
	if d.regs == nil {
		var last uint32
		counted := false
		for _, e := range d.exact {
			if e.t > t || e.t < startT || (counted && e.fp == last) {
				continue
			}
			n++
			last, counted = e.fp, true
		}
	} else {
		n = d.sketchAt(t, start, startT)
	}
	d.cacheOK, d.cacheT, d.cacheV = true, t, n
	return n
}

func (d *Distinct) sketchAt(t, start, startT int64) uint64 {
	if t >= d.newest {
		// Every tail entry is at or before t: the tail view holds them.
		v := d.view(start, true)
		if !v.estOK {
			v.est, v.estOK = estimateHist(&v.hist, d.spec.Precision), true
		}
		return uint64(v.est + 0.5)
	}
	v := d.view(start, false)
	keys := d.scratch[:0]
	for _, e := range d.liveTail() {
		if e.t > t {
			break
		}
		if e.t >= startT && uint8(e.key&63) > v.regs[e.key>>6] {
			keys = append(keys, e.key)
		}
	}
	d.scratch = keys
	if len(keys) == 0 {
		if !v.estOK {
			v.est, v.estOK = estimateHist(&v.hist, d.spec.Precision), true
		}
		return uint64(v.est + 0.5)
	}
	// Overlay the unsettled items: per register, the largest rho wins.
	slices.Sort(keys)
	hist := v.hist
	prev := ^uint32(0)
	for i := len(keys) - 1; i >= 0; i-- {
		k := keys[i]
		j := k >> 6
		if j == prev {
			continue // a larger rho of the same register came first
		}
		prev = j
		hist[v.regs[j]]--
		hist[k&63]++
	}
	return uint64(estimateHist(&hist, d.spec.Precision) + 0.5)
}

// Reset empties the summary, keeping its spec.
func (d *Distinct) Reset() {
	*d = Distinct{spec: d.spec, k: d.k, exact: d.exact[:0]}
}

// SizeBytes approximates the heap footprint in bytes.
func (d *Distinct) SizeBytes() int {
	n := 200 + 16*cap(d.exact) + 16*cap(d.tail) + 4*cap(d.scratch)
	if d.regs != nil {
		n += d.regs.sizeBytes()
	}
	for i := range d.views {
		n += cap(d.views[i].regs)
	}
	return n
}
