package window

import (
	"cmp"
	"encoding/binary"
	"math"
	"time"
	"unsafe"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
)

// SlidingSpec defines a sliding window over event time, cut into panes.
// A zero field means its default; Window is required.
type SlidingSpec struct {
	// Window is the window length, > 0 and a multiple of Resolution.
	// Required; no default.
	Window time.Duration
	// Resolution is the pane width, > 0. Panes are aligned to the Unix
	// epoch: pane(t) = floor(t / Resolution). A smaller resolution narrows
	// the trailing-edge error and costs more panes. Default Window/60 (at
	// least 1 ns).
	Resolution time.Duration
	// Horizon is how far behind the newest added time Add and as-of queries
	// stay exact; >= 0. A pipeline passes its allowed disorder. Default 0.
	Horizon time.Duration
}

// withDefaults returns s with zero fields set to their defaults.
func (s SlidingSpec) withDefaults() SlidingSpec {
	if s.Window > 0 {
		s.Resolution = cmp.Or(s.Resolution, max(s.Window/60, 1))
	}
	return s
}

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil. Zero fields mean their defaults.
func (s SlidingSpec) Validate() error {
	s = s.withDefaults()
	e := newSpecErrs("SlidingSpec")
	e.positive("Window", s.Window)
	e.check(s.Window <= 0 || s.Resolution > 0, "Resolution", "must be > 0")
	e.check(s.Window <= 0 || s.Resolution <= 0 || s.Window%s.Resolution == 0,
		"Window", "must be a multiple of Resolution")
	e.nonNegative("Horizon", s.Horizon)
	return e.err()
}

// event is one raw event kept with its exact time.
type event struct {
	t int64
	v float64
}

// op says how a value joins a pane.
type op uint8

const (
	opCount op = iota
	opSum
	opMin
	opMax
)

func (o op) merge(acc, v float64) float64 {
	switch o {
	case opSum:
		return acc + v
	case opMin: // values are never NaN, so plain comparisons do
		if v < acc {
			return v
		}
		return acc
	case opMax:
		if v > acc {
			return v
		}
		return acc
	}
	return 0
}

func (o op) hasValue() bool { return o != opCount }

// pane is the aggregate of the folded events of one pane. n >= 1; v is the
// sum, minimum or maximum of their values (unused by counts).
type pane struct {
	idx int64
	n   uint64
	v   float64
}

// ring is the pane mechanism shared by the sliding aggregates. Its exported
// methods are promoted to them. See SlidingCount for the semantics.
//
// Let r = Resolution, n = Window/r, maxT = newest added time,
// cutoff = maxT − Horizon, floor = pane(cutoff) − n + 1.
// Invariants (checked by checkInvariants in tests):
//   - !seen implies no panes and no raw events;
//   - total == sum of panes[i].n + raw.len();
//   - panes are in strictly increasing idx order, each with n >= 1 and
//     floor <= idx <= pane(cutoff);
//   - raw is sorted by t (ties in arrival order), each cutoff < t <= maxT;
type ring struct {
	sh *ringShape // what the spec fixes; nil: not built from a valid spec

	seen  bool
	maxT  int64
	total uint64
	panes seq[pane]
	raw   seq[event]
	// Storage inside the value for the first panes and raw events, so
	// that a sparse aggregate (most entities) holds no slice of its own.
	// A value is therefore never copied once built.
	pinl [inlinePanes]pane
	rinl [inlineEvents]event
}

// Inline capacities: most entities have an event or two in a window, and
// with a small Horizon the raw events are those at the newest time.
const (
	inlinePanes  = 1
	inlineEvents = 1
)

// ringShape is what a spec fixes for a ring, immutable once built: every
// aggregate made from one (InitLike) points to it rather than carrying a
// copy, which keeps a per-entity aggregate small.
type ringShape struct {
	spec SlidingSpec
	n    int64 // Window / Resolution
	res  int64 // Resolution in ns
	hor  int64 // Horizon in ns
	op   op
	kind byte
	// Velocity only: its spec (defaults applied) and its short window in
	// panes.
	vspec VelocitySpec
	short int64
}

func newRingShape(spec SlidingSpec, o op, kind byte) (*ringShape, error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	spec = spec.withDefaults()
	return &ringShape{spec: spec, op: o, kind: kind, res: int64(spec.Resolution), hor: int64(spec.Horizon),
		n: int64(spec.Window / spec.Resolution)}, nil
}

// init makes g an empty aggregate over spec in place, whatever it held.
// It allocates the shape; initLike does not.
func (g *ring) init(spec SlidingSpec, o op, kind byte) error {
	sh, err := newRingShape(spec, o, kind)
	g.initLike(sh)
	return err
}

// initLike makes g an empty aggregate of shape sh (nil: unusable), in
// place and with no allocation: storage starts on the inline arrays and
// grows by append, then is reused, so the steady state allocates nothing.
func (g *ring) initLike(sh *ringShape) {
	*g = ring{sh: sh}
	g.panes.buf = g.pinl[:0]
	g.raw.buf = g.rinl[:0]
}

// Spec returns the spec the aggregate was built with, defaults applied.
func (g *ring) Spec() SlidingSpec {
	if g.sh == nil {
		return SlidingSpec{}
	}
	return g.sh.spec
}

// Reset empties the aggregate and keeps its spec and storage.
func (g *ring) Reset() {
	g.seen, g.maxT, g.total = false, 0, 0
	g.panes.clear()
	g.raw.clear()
}

// Newest returns the largest time added; ok is false (and t 0) if none.
func (g *ring) Newest() (t int64, ok bool) { return g.maxT, g.seen }

// Count returns the number of events retained (folded into panes or raw).
func (g *ring) Count() uint64 { return g.total }

// HintMemory starts bringing the panes and raw events the value keeps
// outside itself into the processor's caches, for a caller about to add
// or query: it reads the value (which should be in the caches already)
// and changes nothing.
func (g *ring) HintMemory() {
	g.panes.hint(g.pinl[:])
	g.raw.hint(g.rinl[:])
}

// SizeBytes returns the approximate heap footprint in bytes.
func (g *ring) SizeBytes() int {
	return int(unsafe.Sizeof(*g)) + g.panes.sizeBytes(int(unsafe.Sizeof(pane{})), g.pinl[:]) +
		g.raw.sizeBytes(int(unsafe.Sizeof(event{})), g.rinl[:])
}

func (g *ring) paneOf(t int64) int64 { return sat.FloorDiv(t, g.sh.res) }

// paneStart is the first time of pane idx, saturated to the int64 range.
func (g *ring) paneStart(idx int64) int64 { return startOf(idx, g.sh.res) }

func (g *ring) cutoff() int64 { return sat.Sub(g.maxT, g.sh.hor) }

// add applies one event; see SlidingCount.Add.
func (g *ring) add(t int64, v float64) bool {
	if g.sh == nil || (g.sh.op.hasValue() && !finite(v)) {
		return false
	}
	if !g.sh.op.hasValue() {
		v = 0
	}
	switch {
	case !g.seen:
		g.seen, g.maxT = true, t
	case t > g.maxT:
		prev := g.maxT
		g.maxT = t
		g.advance(prev)
	}
	if t > g.cutoff() {
		insertSorted(&g.raw, event{t, v})
	} else {
		// Only a time older than maxT can be rejected, so nothing has
		// changed above when this returns false.
		p := g.paneOf(t)
		if p < sat.Sub(g.paneOf(g.cutoff()), g.sh.n-1) {
			return false
		}
		g.foldLate(p, v)
	}
	g.total++
	return true
}

// advance, after maxT rose from prev, discards panes older than the floor
// and folds raw events that fell to or behind the cutoff. Raw events are
// newer than the previous cutoff, so they fold onto the last pane or
// after it. Discarding first means a sparse entity never holds its old
// pane and the newly folded one at once: one pane of storage serves it.
func (g *ring) advance(prev int64) {
	c := g.cutoff()
	cp := g.paneOf(c)
	f := sat.Sub(cp, g.sh.n-1)
	if cp != g.paneOf(sat.Sub(prev, g.sh.hor)) { // the floor moved
		k := 0
		for ps := g.panes.live(); k < len(ps) && ps[k].idx < f; k++ {
			g.total -= ps[k].n
		}
		g.panes.popFront(k)
	}
	k := foldable(&g.raw, c)
	cstart := g.paneStart(cp)
	for _, e := range g.raw.live()[:k] {
		p := cp // no division when e lies in the cutoff's pane
		if e.t < cstart {
			p = g.paneOf(e.t)
		}
		switch {
		case p < f:
			g.total-- // behind the floor already: gone
		case g.panes.len() > 0 && g.panes.last().idx == p:
			l := g.panes.last()
			l.n++
			l.v = g.sh.op.merge(l.v, e.v)
		default:
			g.panes.push(pane{idx: p, n: 1, v: e.v})
		}
	}
	g.raw.popFront(k)
}

// foldLate adds an event at or behind the cutoff to pane p >= floor.
func (g *ring) foldLate(p int64, v float64) {
	ps := g.panes.live()
	i := len(ps)
	for i > 0 && ps[i-1].idx > p {
		i--
	}
	if i > 0 && ps[i-1].idx == p {
		ps[i-1].n++
		ps[i-1].v = g.sh.op.merge(ps[i-1].v, v)
		return
	}
	g.panes.insert(i, pane{idx: p, n: 1, v: v})
}

// queryAll is query over the whole window (0 for an unusable ring).
func (g *ring) queryAll(t int64) (n uint64, v float64) {
	if g.sh == nil {
		return 0, 0
	}
	return g.query(t, g.sh.n)
}

// query aggregates the events of the window of w panes as of t; see
// SlidingCount.CountAt for the semantics. v is meaningless when n == 0.
func (g *ring) query(t int64, w int64) (n uint64, v float64) {
	if g.sh == nil || !g.seen {
		return 0, 0
	}
	hi := g.paneOf(t)
	lo := sat.Sub(hi, w-1)
	exact := t >= g.cutoff()
	if !exact {
		hi--
	}
	vals := g.sh.op.hasValue()
	ps := g.panes.live()
	if exact && !vals {
		return g.countExact(t, lo), 0
	}
	for i := searchPane(ps, lo); i < len(ps) && ps[i].idx <= hi; i++ {
		if vals {
			v = g.mergeInto(n, v, ps[i].v)
		}
		n += ps[i].n
	}
	if !exact {
		return n, v
	}
	start := g.paneStart(lo)
	for _, e := range g.raw.live() {
		if e.t > t {
			break
		}
		if e.t >= start {
			if vals {
				v = g.mergeInto(n, v, e.v)
			}
			n++
		}
	}
	return n, v
}

// countExact is query for counts at t >= cutoff in time independent of
// the window's length: the total less what lies outside the window. Every
// folded pane is at or before pane(cutoff) <= pane(t), so only panes below
// lo (at most Horizon/Resolution + 1 of them, between the floor and lo)
// and raw events after t or before the window's start are subtracted.
func (g *ring) countExact(t, lo int64) uint64 {
	n := g.total
	ps := g.panes.live()
	for i := 0; i < len(ps) && ps[i].idx < lo; i++ {
		n -= ps[i].n
	}
	raw := g.raw.live()
	for i := len(raw) - 1; i >= 0 && raw[i].t > t; i-- {
		n--
	}
	start := g.paneStart(lo)
	for i := 0; i < len(raw) && raw[i].t < start; i++ {
		n--
	}
	return n
}

// mergeInto joins x into the accumulator v that holds n events so far.
func (g *ring) mergeInto(n uint64, v, x float64) float64 {
	if n == 0 {
		return x
	}
	return g.sh.op.merge(v, x)
}

// searchPane returns the first i with ps[i].idx >= lo.
func searchPane(ps []pane, lo int64) int {
	i, j := 0, len(ps)
	for i < j {
		h := int(uint(i+j) >> 1)
		if ps[h].idx < lo {
			i = h + 1
		} else {
			j = h
		}
	}
	return i
}

// AppendBinary appends the encoding of the state (not the spec) to dst.
// The layout is given on UnmarshalBinary.
func (g *ring) AppendBinary(dst []byte) ([]byte, error) {
	if g.sh == nil {
		return dst, errInvalidAgg
	}
	dst, done, err := appendHeader(dst, true, g.seen, g.sh.kind, 0, g.maxT)
	if done {
		return dst, err
	}
	ps := g.panes.live()
	dst = binary.AppendUvarint(dst, uint64(len(ps)))
	prev := g.paneOf(g.cutoff())
	for i := len(ps) - 1; i >= 0; i-- {
		dst = binary.AppendUvarint(dst, uint64(prev-ps[i].idx))
		prev = ps[i].idx - 1
		dst = binary.AppendUvarint(dst, ps[i].n-1)
		if g.sh.op.hasValue() {
			dst = appendFloat(dst, ps[i].v)
		}
	}
	dst = appendEvents(dst, g.raw.live(), g.maxT, g.sh.op.hasValue())
	return dst, nil
}

// UnmarshalBinary replaces the state with the decoded one. The receiver
// must have been built with the spec the state was encoded under (the spec
// is not stored); a state that this spec cannot hold is ErrCorrupt. On
// error the receiver is unchanged.
//
// Layout, version 1 (varint = encoding/binary zigzag varint, uvarint =
// encoding/binary unsigned varint, float = 8 bytes little-endian IEEE 754,
// never NaN):
//
//	byte     version = 1 (else ErrUnknownVersion)
//	byte     kind: 1 count, 2 sum, 3 min, 4 max, 5 mean, 7 velocity
//	         (must match the receiver, else ErrWrongKind)
//	byte     flags: bit 0 = some event was added; other bits zero
//	if bit 0 is set:
//	varint   maxT, the newest time added
//	uvarint  P, the number of non-empty panes, then P panes, newest first:
//	  uvarint  gap: the first pane is pane(maxT − Horizon) − gap; each
//	           next one is (previous pane − 1) − gap; all >= the floor
//	  uvarint  count − 1
//	  float    sum, min or max of the pane (kinds 2..5 only)
//	uvarint  R, the number of raw events, then R events, newest first:
//	  uvarint  delta: the first time is maxT − delta, each next one is the
//	           previous time − delta; all > maxT − Horizon
//	  float    value (kinds 2..5 only)
//	then end of input (else ErrTrailingBytes).
func (g *ring) UnmarshalBinary(b []byte) error {
	return decodeTwoPass(g.sh != nil, "sliding", b, g.decode)
}

func (g *ring) decode(b []byte, store bool) error {
	r := wire.Decoder{B: b}
	_, maxT, ok := startState(&r, g.sh.kind, flagSeen, store, g.Reset)
	if !ok {
		return r.Err
	}
	cutoff := sat.Sub(maxT, g.sh.hor)
	pc := g.paneOf(cutoff)
	floor := sat.Sub(pc, g.sh.n-1)
	vbytes := 0
	if g.sh.op.hasValue() {
		vbytes = 8
	}
	np := r.Count(2+vbytes, math.MaxUint64)
	if store {
		g.panes.setLen(np)
	}
	var total uint64
	prev := pc
	for i := np - 1; i >= 0 && r.Err == nil; i-- {
		gap := r.Uvarint()
		if prev < floor || gap > uint64(prev-floor) {
			r.Fail("pane before the floor")
			break
		}
		p := prev - int64(gap)
		cnt := r.Uvarint() + 1
		var v float64
		if vbytes > 0 {
			v = readFloat(&r, "pane value")
		}
		if cnt == 0 || total+cnt < total {
			r.Fail("pane count overflow")
		}
		total += cnt
		if store {
			*g.panes.at(i) = pane{idx: p, n: cnt, v: v}
		}
		prev = p - 1
	}
	limit := 0.0
	if vbytes > 0 {
		limit = math.MaxFloat64
	}
	nr, _ := readEvents(&r, &g.raw, maxT, cutoff, limit, store)
	if total+uint64(nr) < total {
		r.Fail("count overflow")
	}
	if err := r.Finish(); err != nil || !store {
		return err
	}
	g.seen, g.maxT, g.total = true, maxT, total+uint64(nr)
	return nil
}
