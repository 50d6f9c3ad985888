package sketch

import (
	"cmp"
	"github.com/tallyward/tallyward/internal/check"
	"math"
	"slices"
	"time"
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
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
// Cost: Add is expected O(1) in exact mode (a hash probe and a walk of
// the item's entries, one per retained pane it was seen in; a sort of
// the entries every ExactLimit-or-so adds, O(log n) amortised) and O(1)
// amortised in sketch mode; DistinctAt is O(live entries) in exact mode and
// O(entries within Horizon) plus a cached O(64) estimate in sketch mode,
// with an O(2^p) rebuild the first time a new window start is queried (once
// per pane boundary). Not safe for concurrent use, including concurrent
// queries.
type Distinct struct {
	sh     *distinctShape // nil: not built from a valid spec
	newest int64
	has    bool
	// cacheOK: the query cache below is valid.
	cacheOK bool
	nfp     int32 // exact mode: see exact

	// Exact mode (sk == nil). Entries are in no particular order; the
	// entries of one fingerprint form a chain (exactEntry.link) that
	// starts at its first entry. Invariants: at most one entry per
	// (fp, pane) apart from one settled entry a normalisation rounded
	// down to its pane's start; nfp == the number of chains >= the number
	// of distinct fp with an entry whose pane is retained; index, when
	// len(exact) > smallExact, maps every fp to its chain's first entry.
	exact []exactEntry
	index *fpIndex // allocated once past smallExact entries
	// einl is exact's first storage, inside the value: most entities see
	// an item or two. A value is therefore never copied once built.
	einl [inlineExact]exactEntry

	// Sketch mode: allocated at the switch, so an exact summary (most
	// entities) carries none of it.
	sk *distinctSketch

	// Query cache: the last answer, valid until the next mutation.
	cacheT int64
	cacheV uint64
}

// distinctShape is what a spec fixes, shared by every summary InitLike
// builds from one prototype.
type distinctShape struct {
	spec DistinctSpec // defaults applied
	k    int64        // panes per window
}

func newDistinctShape(spec DistinctSpec) *distinctShape {
	spec = spec.withDefaults()
	return &distinctShape{spec: spec, k: int64(spec.Window / spec.Resolution)}
}

// distinctSketch is the state of sketch mode.
type distinctSketch struct {
	regs     *slidingRegs
	tail     []tailEntry // [tailHead:] sorted by (t, key), distinct; t > newest-Horizon
	tailHead int
	views    [3]regView
	useClock uint64
	scratch  []uint32
}

// exactEntry is one (fingerprint, time) of exact mode.
type exactEntry struct {
	fp uint32
	// link: bit 31 set on every entry of a chain but its first; the low
	// 31 bits are 1 + the index of the chain's next entry, 0 at its end.
	link uint32
	t    int64
}

const (
	linkLater   = 1 << 31
	linkNext    = linkLater - 1
	inlineExact = 2
	// smallExact: up to this many entries a linear scan finds a chain
	// faster than a hash index, which costs memory.
	smallExact = 8
)

// fpIndex finds a fingerprint's chain: open addressing on fp, each slot
// 1 + the index of the chain's first entry, 0 = empty.
type fpIndex struct{ slots []uint32 }

// slots returns the index's slots, nil if there is none.
func (d *Distinct) slots() []uint32 {
	if d.index == nil {
		return nil
	}
	return d.index.slots
}

type tailEntry struct {
	t   int64
	key uint32
}

// NewDistinct returns an empty windowed distinct count for spec, or an
// error wrapping ErrInvalidSpec.
func NewDistinct(spec DistinctSpec) (*Distinct, error) {
	d := new(Distinct)
	if err := d.Init(spec); err != nil {
		return nil, err
	}
	return d, nil
}

// Init makes d an empty count over spec in place, whatever d held, or
// returns an error wrapping ErrInvalidSpec (d is then unusable: it
// refuses adds and answers 0). A Distinct can so live by value inside a
// larger object; its first entries are stored inside the value, so d
// must not be copied afterwards. Init allocates the small immutable
// parameters; InitLike shares those of a summary already built, with no
// allocation.
func (d *Distinct) Init(spec DistinctSpec) error {
	*d = Distinct{}
	if err := spec.Validate(); err != nil {
		return err
	}
	d.InitLike(&Distinct{sh: newDistinctShape(spec)})
	return nil
}

// InitLike makes d an empty count with the spec proto was built with,
// sharing proto's immutable parameters: no validation, no allocation. d
// must not be copied afterwards.
func (d *Distinct) InitLike(proto *Distinct) {
	*d = Distinct{sh: proto.sh}
	d.exact = d.einl[:0]
}

// Spec returns the spec with defaults applied.
func (d *Distinct) Spec() DistinctSpec {
	if d.sh == nil {
		return DistinctSpec{}
	}
	return d.sh.spec
}

// Newest returns the largest time added so far, and false if nothing was.
func (d *Distinct) Newest() (int64, bool) { return d.newest, d.has }

// Exact reports whether the summary is still in exact mode.
func (d *Distinct) Exact() bool { return d.sk == nil }

// RelativeError returns the relative standard error of DistinctAt: 0 while
// exact, 1.04/sqrt(2^p) once in sketch mode (Flajolet et al., AofA 2007).
// The pane trailing edge (see Distinct) is not included.
func (d *Distinct) RelativeError() float64 {
	if d.sk == nil {
		return 0
	}
	return 1.04 / math.Sqrt(float64(uint64(1)<<d.sh.spec.Precision))
}

func (d *Distinct) res() int64 { return int64(d.sh.spec.Resolution) }
func (d *Distinct) hor() int64 { return int64(d.sh.spec.Horizon) }

func (d *Distinct) pane(t int64) int64 { return sat.FloorDiv(t, d.res()) }

// floorPane is the oldest pane any query at t >= newest-Horizon reads.
func (d *Distinct) floorPane() int64 {
	return d.pane(d.newest-d.hor()) - d.sh.k + 1
}

// Add records item h at time t. It returns false, changing nothing, if t is
// outside ±2^62 or if t's pane is older than every window a query at or
// after Newest()-Horizon can read (such an add could never be counted).
func (d *Distinct) Add(t int64, h uint64) bool {
	if t < minTime || t > maxTime || d.sh == nil {
		return false
	}
	if !d.has || t > d.newest {
		d.newest, d.has = t, true
	}
	if d.pane(t) < d.floorPane() {
		return false
	}
	d.cacheOK = false
	if d.sk != nil {
		d.addSketch(t, fpKey(uint32(h>>32), d.sh.spec.Precision))
		return true
	}
	d.addExact(uint32(h>>32), t)
	return true
}

func cmpExact(a, b exactEntry) int {
	if c := cmp.Compare(a.fp, b.fp); c != 0 {
		return c
	}
	return cmp.Compare(a.t, b.t)
}

// addExact adds (fp, t) in expected O(1): one probe of the index (or a
// scan of at most smallExact entries) and a walk of fp's chain, whose
// length is bounded by the retained panes and is usually 1.
func (d *Distinct) addExact(fp uint32, t int64) {
	// Invariant: one entry per (fp, pane), the earliest. An entry is
	// dominated by an earlier one of the same item in the same pane: any
	// query that counts the later one counts the earlier one too. With a
	// normalised settled entry beside an unsettled one in its pane, the
	// earliest of them decides.
	head := d.findExact(fp)
	if head >= 0 {
		p := d.pane(t)
		best := -1
		for i := head; i >= 0; i = d.exact[i].next() {
			if e := d.exact[i]; d.pane(e.t) == p && (best < 0 || e.t < d.exact[best].t) {
				best = i
			}
		}
		if best >= 0 {
			if t < d.exact[best].t {
				d.exact[best].t = t
			}
			return
		}
		// Second in the chain: the chain's order does not matter.
		i := len(d.exact)
		d.exact = append(d.exact, exactEntry{fp: fp, t: t, link: linkLater | d.exact[head].link&linkNext})
		d.exact[head].link = d.exact[head].link&linkLater | uint32(i+1)
	} else {
		d.exact = append(d.exact, exactEntry{fp: fp, t: t})
		d.nfp++
		if len(d.exact) > smallExact {
			if len(d.slots()) < 2*int(d.nfp) {
				d.buildIndex()
			} else {
				d.indexAdd(len(d.exact) - 1)
			}
		}
	}
	if len(d.exact) == smallExact+1 && len(d.slots()) == 0 {
		d.buildIndex()
	}
	if int(d.nfp) > d.sh.spec.ExactLimit || len(d.exact) > 2*int(d.nfp)+16 {
		d.normalizeExact()
		if int(d.nfp) > d.sh.spec.ExactLimit {
			d.promote()
		}
	}
}

// next is the index of the next entry of e's chain, or -1.
func (e exactEntry) next() int { return int(e.link&linkNext) - 1 }

// findExact returns the index of fp's first entry, or -1.
func (d *Distinct) findExact(fp uint32) int {
	ix := d.slots()
	if len(d.exact) <= smallExact || len(ix) == 0 {
		for i, e := range d.exact {
			if e.fp == fp && e.link&linkLater == 0 {
				return i
			}
		}
		return -1
	}
	mask := uint32(len(ix) - 1)
	for j := fp & mask; ; j = (j + 1) & mask {
		x := ix[j]
		if x == 0 {
			return -1
		}
		if d.exact[x-1].fp == fp {
			return int(x - 1)
		}
	}
}

// indexAdd enters the first entry of a new chain, at i, in the index.
func (d *Distinct) indexAdd(i int) {
	ix := d.index.slots
	mask := uint32(len(ix) - 1)
	j := d.exact[i].fp & mask
	for ix[j] != 0 {
		j = (j + 1) & mask
	}
	ix[j] = uint32(i + 1)
}

// buildIndex sizes the index to at least twice the chains (load <= 1/2)
// and fills it; below smallExact entries it empties it.
func (d *Distinct) buildIndex() {
	if len(d.exact) <= smallExact {
		if d.index != nil {
			d.index.slots = d.index.slots[:0] // kept: a set that shrank often grows again
		}
		return
	}
	n := 16
	for n < 2*int(d.nfp) {
		n *= 2
	}
	if d.index == nil {
		d.index = &fpIndex{}
	}
	if cap(d.index.slots) >= n {
		d.index.slots = d.index.slots[:n]
		clear(d.index.slots)
	} else {
		d.index.slots = make([]uint32, n)
	}
	for i, e := range d.exact {
		if e.link&linkLater == 0 {
			d.indexAdd(i)
		}
	}
}

// sortExact orders the entries by (fp, t), the order normalizeExact,
// the encoding and promote read them in, and rebuilds the chains.
func (d *Distinct) sortExact() {
	slices.SortFunc(d.exact, cmpExact)
	d.relink()
}

// relink rebuilds the chains and the index of entries sorted by (fp, t)
// and recounts nfp.
func (d *Distinct) relink() {
	d.nfp = 0
	for i := range d.exact {
		d.exact[i].link = 0
		if i > 0 && d.exact[i-1].fp == d.exact[i].fp {
			d.exact[i].link = linkLater
			d.exact[i-1].link |= uint32(i + 1)
		} else {
			d.nfp++
		}
	}
	d.buildIndex()
}

// normalizeExact drops entries no allowed query can read, rounds settled
// times (at or before newest-Horizon) down to their pane start, and keeps
// only the latest settled entry of each item. None of this changes an
// answer within the contract, so the encoding and the promotion point
// depend only on what was added.
func (d *Distinct) normalizeExact() {
	slices.SortFunc(d.exact, cmpExact)
	floorT := d.floorPane() * d.res()
	settled := d.newest - d.hor()
	out := d.exact[:0]
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
		if haveBest {
			out = append(out, exactEntry{fp: fp, t: best})
		}
		for ; i < j; i++ {
			if e := d.exact[i]; e.t > settled && e.t >= floorT {
				out = append(out, e)
			}
		}
	}
	clear(d.exact[len(out):])
	d.exact = out
	d.relink() // counts the chains: nfp items
}

// promote moves the exact entries into sliding registers.
func (d *Distinct) promote() {
	floor := d.floorPane()
	slices.SortFunc(d.exact, cmpExact)
	d.sk = &distinctSketch{regs: newSlidingRegs(d.sh.spec.Precision, floor)}
	for _, e := range d.exact {
		if d.pane(e.t) >= floor {
			d.addSketch(e.t, fpKey(e.fp, d.sh.spec.Precision))
		}
	}
	d.exact, d.nfp, d.index = d.einl[:0], 0, nil
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
			d.sk.tail = slices.Insert(d.sk.tail, d.sk.tailHead+i, tailEntry{t, key})
			d.applyViews(d.pane(t), key, true)
		}
	} else {
		d.fold(d.pane(t), key)
	}
	d.settleTail()
}

// liveTail returns the unsettled entries.
func (d *Distinct) liveTail() []tailEntry { return d.sk.tail[d.sk.tailHead:] }

// settleTail folds the tail entries that newest has moved past. They are
// dropped by advancing tailHead; the buffer is compacted in place once the
// dropped prefix is the larger half, so the cost is amortised O(1).
func (d *Distinct) settleTail() {
	settled := d.newest - d.hor()
	for d.sk.tailHead < len(d.sk.tail) && d.sk.tail[d.sk.tailHead].t <= settled {
		d.fold(d.pane(d.sk.tail[d.sk.tailHead].t), d.sk.tail[d.sk.tailHead].key)
		d.sk.tailHead++
	}
	if d.sk.tailHead > 64 && 2*d.sk.tailHead > len(d.sk.tail) {
		n := copy(d.sk.tail, d.sk.tail[d.sk.tailHead:])
		d.sk.tail = d.sk.tail[:n]
		d.sk.tailHead = 0
	}
}

// fold applies a settled (pane, key) to the registers and the cached views.
func (d *Distinct) fold(pane int64, key uint32) {
	floor := d.floorPane()
	if pane < floor {
		return
	}
	r := d.sk.regs
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
	for i := range d.sk.views {
		v := &d.sk.views[i]
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
	d.sk.useClock++
	slot := 0
	for i := range d.sk.views {
		v := &d.sk.views[i]
		if v.valid && v.start == start && v.withTail == withTail {
			v.stamps = d.sk.useClock
			return v
		}
		if !v.valid || v.stamps < d.sk.views[slot].stamps {
			slot = i
		}
	}
	v := &d.sk.views[slot]
	m := 1 << d.sh.spec.Precision
	if len(v.regs) != m {
		v.regs = make([]uint8, m)
	}
	v.hist = [64]uint32{}
	regs := d.sk.regs
	off := start - regs.base
	for j, w := range regs.words {
		var x uint8
		if w == spillMark {
			x = regs.valueFrom(uint32(j), start)
		} else {
			x = inlineValueFrom(w, off)
		}
		v.regs[j] = x
		v.hist[x]++
	}
	v.start, v.withTail, v.valid, v.estOK, v.stamps = start, withTail, true, false, d.sk.useClock
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
	if !d.has || t < minTime || t > maxTime || d.sh == nil {
		return 0
	}
	if d.cacheOK && d.cacheT == t {
		return d.cacheV
	}
	if d.sk == nil && t < d.newest-d.hor() {
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
	start := max(d.pane(t)-d.sh.k+1, d.floorPane())
	startT := start * d.res()
	var n uint64
	if d.sk == nil {
		for _, e := range d.exact {
			if e.link&linkLater != 0 {
				continue
			}
			for ; ; e = d.exact[e.next()] {
				if e.t <= t && e.t >= startT {
					n++
					break
				}
				if e.next() < 0 {
					break
				}
			}
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
			v.est, v.estOK = estimateHist(&v.hist, d.sh.spec.Precision), true
		}
		return uint64(v.est + 0.5)
	}
	v := d.view(start, false)
	keys := d.sk.scratch[:0]
	for _, e := range d.liveTail() {
		if e.t > t {
			break
		}
		if e.t >= startT && uint8(e.key&63) > v.regs[e.key>>6] {
			keys = append(keys, e.key)
		}
	}
	d.sk.scratch = keys
	if len(keys) == 0 {
		if !v.estOK {
			v.est, v.estOK = estimateHist(&v.hist, d.sh.spec.Precision), true
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
	return uint64(estimateHist(&hist, d.sh.spec.Precision) + 0.5)
}

// Reset empties the summary, keeping its spec.
func (d *Distinct) Reset() {
	*d = Distinct{sh: d.sh, exact: d.exact[:0]}
}

// HintMemory starts bringing the exact entries the summary keeps outside
// itself into the processor's caches (up to two lines), for a caller
// about to add or query: it reads the value (which should be in the
// caches already) and changes nothing.
func (d *Distinct) HintMemory() {
	if d.sk != nil || len(d.exact) == 0 || unsafe.SliceData(d.exact) == &d.einl[0] {
		return
	}
	prefetch.Range(unsafe.Pointer(unsafe.SliceData(d.exact)), min(len(d.exact)*int(unsafe.Sizeof(exactEntry{})), 128))
}

// SizeBytes approximates the heap footprint in bytes.
func (d *Distinct) SizeBytes() int {
	n := int(unsafe.Sizeof(*d))
	if d.index != nil {
		n += int(unsafe.Sizeof(*d.index)) + 4*cap(d.index.slots)
	}
	if cap(d.exact) > 0 && unsafe.SliceData(d.exact) != &d.einl[0] {
		n += int(unsafe.Sizeof(exactEntry{})) * cap(d.exact)
	}
	if s := d.sk; s != nil {
		n += int(unsafe.Sizeof(*s)) + int(unsafe.Sizeof(tailEntry{}))*cap(s.tail) + 4*cap(s.scratch) + s.regs.sizeBytes()
		for i := range s.views {
			n += cap(s.views[i].regs)
		}
	}
	return n
}
