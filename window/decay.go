package window

import (
	"cmp"
	"math"
	"time"
	"unsafe"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
)

// DecaySpec defines exponentially decayed statistics with a half-life. A
// zero field means its default; HalfLife is required.
type DecaySpec struct {
	// HalfLife, > 0: an event's weight halves every HalfLife of event time.
	// Required; no default.
	HalfLife time.Duration
	// Horizon is how far behind the newest added time as-of queries stay
	// exact; >= 0. Default 0.
	Horizon time.Duration
	// RebaseEvery is the number of half-lives between landmarks; the
	// landmarks are the multiples of RebaseEvery·HalfLife since the Unix
	// epoch, fixed in advance. 1..64; 0 means the default, 32.
	RebaseEvery int64
}

const (
	defaultRebaseEvery = 32
	maxRebaseEvery     = 64

	// MaxDecayedValue bounds |x| for Decayed.Add. With weights below
	// 2^64, squared deviations times weights stay below 2^266, so no
	// reachable state overflows float64.
	MaxDecayedValue = 1e30

	// Decoded states are checked against bounds far above what any real
	// stream reaches (2^200 events at the largest weight) and far below
	// overflow.
	// A weighted mean of values within ±MaxDecayedValue can round a little
	// past it: the bound on a decoded mean has slack.
	maxDecodedWeight = 0x1p300
	maxDecodedM2     = 0x1p700
	maxDecodedMean   = 2 * MaxDecayedValue
)

func (s DecaySpec) rebase() int64 { return cmp.Or(s.RebaseEvery, defaultRebaseEvery) }

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil.
func (s DecaySpec) Validate() error {
	e := newSpecErrs("DecaySpec")
	e.positive("HalfLife", s.HalfLife)
	e.nonNegative("Horizon", s.Horizon)
	k := s.rebase()
	e.check(k >= 1 && k <= maxRebaseEvery, "RebaseEvery", "must be in 1..64 (0 for 32)")
	e.check(s.HalfLife <= 0 || k < 1 || int64(s.HalfLife) <= math.MaxInt64/k,
		"RebaseEvery", "times HalfLife overflows int64")
	return e.err()
}

// Decayed keeps an exponentially decayed count, sum, mean and variance of
// event values, by forward decay (Cormode, Shkapenyuk, Srivastava, Xu,
// "Forward decay: a practical time decay model for streaming systems",
// ICDE 2009).
//
// With half-life h, an event (ti, xi) has weight 2^(−(t − ti)/h) as of t:
// 1 at its own time, 1/2 one half-life later. As of t, over the events with
// ti <= t:
//
//	CountAt(t)    = Σ 2^(−(t−ti)/h)                  (decayed count)
//	SumAt(t)      = Σ 2^(−(t−ti)/h) · xi             (decayed sum)
//	MeanAt(t)     = SumAt(t) / CountAt(t)
//	VarianceAt(t) = Σ wi (xi − mean)² / Σ wi         (weighted population
//	                                                  variance, wi as above)
//
// The mean and variance do not change as t advances with no new event
// (every weight scales by the same factor). Empty: count and sum 0, mean and
// variance NaN.
//
// How. Weights are stored relative to a landmark L: gi = 2^((ti − L)/h), so
// a query divides by 2^((t − L)/h) and the stored sums do not depend on the
// arrival order of events (up to float rounding; see below). The folded
// weights are accumulated with West's weighted update (West, "Updating mean
// and variance estimates: an improved method", CACM 22(9), 1979): W = Σ gi,
// the mean, and M2 = Σ gi (xi − mean)². The landmark is the latest multiple
// of RebaseEvery·h since the epoch at or before the cutoff. When it moves
// forward by j steps, W and M2 are multiplied by 2^(−j·RebaseEvery), an
// exact power of two, so replay and live rescale identically and no weight
// exceeds 2^RebaseEvery (no overflow over any span of history; weights of
// events more than ~1074 half-lives old round to zero and are dropped).
//
// Horizon. Let maxT = newest time added, cutoff = maxT − Horizon. Events
// with time > cutoff are kept raw; events <= cutoff are folded into W, mean,
// M2 (raw ones when maxT advances past them). Queries at t >= cutoff are
// exact: they add only the raw events with ti <= t. Queries at t < cutoff
// cannot take folded events newer than t back out, so they return NaN (never
// a value that includes a newer event). Add accepts any time; a late event
// (time <= cutoff) is folded directly.
//
// Float addition is not associative (Goldberg, ACM Computing Surveys 23(1),
// 1991): bit-identical results need the same apply order, which the
// pipeline supplies. Add rejects NaN, ±Inf and |x| > MaxDecayedValue
// (returns false), so that no reachable state overflows.
//
// Build with NewDecayed; the zero value ignores Add and answers NaN. Not
// safe for concurrent use.
//
// Invariants: raw is sorted by time with cutoff < t <= maxT;
// land == floor(cutoff / (RebaseEvery·h)), landT is the landmark in ns; W >= 0 and W == 0 implies
// mean == 0 and M2 == 0; !seen implies an empty state.
type Decayed struct {
	sh *decayShape // nil: not built from a valid spec

	seen        bool
	maxT        int64
	land        int64 // landmark index: L = land · step
	landT       int64 // L, saturated: startOf(land, step)
	w, mean, m2 float64
	raw         seq[event]
	rinl        [inlineEvents]event // raw's first storage; never copied once built
	memo        *foldMemo           // at's last fold, kept for the next query; nil: none yet
}

// foldMemo is what at computed last: the statistics after folding the
// first n raw events onto the base, relative to the base's landmark. A query
// at the newest time folds every raw event, with an Exp2 each; a busy
// entity with a long horizon holds many, and folded them all again on
// every query (a quarter of all CPU of a live service with a 10-minute
// MaxDisorder). With the memo a query folds only the events added since.
// The result is bit-identical: folding is sequential, the memo is a state
// the same sequence of operations passes through, and whatever would
// change that sequence (an event inserted before the memo's last one, a
// late event folded into the base, a landmark move) drops the memo. When
// advance folds k leading raw events into the base, it does so with the
// same operations, so the memo then covers n − k events of the base.
type foldMemo struct {
	n           int // 0: nothing kept
	w, mean, m2 float64
}

// memoMin is the fewest raw events a query folds before it keeps a memo:
// below it, folding again is cheaper than the memo's memory.
const memoMin = 4

// forget drops the memo (keeping its memory for the next one).
func (d *Decayed) forget() {
	if d.memo != nil {
		d.memo.n = 0
	}
}

// decayShape is what a spec fixes, shared by the aggregates InitLike
// builds from one prototype.
type decayShape struct {
	spec DecaySpec // defaults applied
	step int64     // RebaseEvery · HalfLife
}

// NewDecayed returns empty decayed statistics over spec, or the errors of
// spec.Validate.
func NewDecayed(spec DecaySpec) (*Decayed, error) {
	d := new(Decayed)
	if err := d.Init(spec); err != nil {
		return nil, err
	}
	return d, nil
}

// Init makes d empty statistics over spec in place, whatever d held, or
// returns the errors of spec.Validate (d is then unusable, like the zero
// value). A Decayed can so live by value inside a larger object; d must
// not be copied afterwards (its first storage is inside it). Init
// allocates its small immutable parameters; InitLike shares those of
// statistics already built, with no allocation.
func (d *Decayed) Init(spec DecaySpec) error {
	*d = Decayed{}
	if err := spec.Validate(); err != nil {
		return err
	}
	spec.RebaseEvery = spec.rebase()
	d.InitLike(&Decayed{sh: &decayShape{spec: spec, step: spec.rebase() * int64(spec.HalfLife)}})
	return nil
}

// InitLike makes d empty statistics with the spec proto was built with,
// sharing proto's immutable parameters: no validation, no allocation. d
// must not be copied afterwards.
func (d *Decayed) InitLike(proto *Decayed) {
	*d = Decayed{sh: proto.sh}
	d.raw.buf = d.rinl[:0]
}

// Spec returns the spec the aggregate was built with, defaults applied.
func (d *Decayed) Spec() DecaySpec {
	if d.sh == nil {
		return DecaySpec{}
	}
	return d.sh.spec
}

// Reset empties the aggregate and keeps its spec and storage.
func (d *Decayed) Reset() {
	d.seen, d.maxT, d.w, d.mean, d.m2 = false, 0, 0, 0, 0
	d.land, d.landT = 0, 0 // the landmark of pane 0, without the shape (nil for the zero value)
	d.raw.clear()
	d.forget()
}

// Newest returns the largest time added; ok is false (and t 0) if none.
func (d *Decayed) Newest() (t int64, ok bool) { return d.maxT, d.seen }

// SizeBytes returns the approximate heap footprint in bytes.
func (d *Decayed) SizeBytes() int {
	n := int(unsafe.Sizeof(*d)) + d.raw.sizeBytes(int(unsafe.Sizeof(event{})), d.rinl[:])
	if d.memo != nil {
		n += int(unsafe.Sizeof(foldMemo{}))
	}
	return n
}

func (d *Decayed) cutoff() int64 { return sat.Sub(d.maxT, int64(d.sh.spec.Horizon)) }

// Add records value x at time t. It returns false, changing nothing, when x
// is NaN or |x| > MaxDecayedValue (or the spec is invalid).
func (d *Decayed) Add(t int64, x float64) bool {
	if d.sh == nil || !(math.Abs(x) <= MaxDecayedValue) {
		return false
	}
	switch {
	case !d.seen:
		d.seen, d.maxT = true, t
		d.setLand(sat.FloorDiv(d.cutoff(), d.sh.step))
	case t > d.maxT:
		d.maxT = t
		d.advance()
	}
	if t > d.cutoff() {
		if m := d.memo; m != nil && m.n > 0 && t < d.raw.live()[m.n-1].t {
			d.forget() // it goes before an event the memo folded
		}
		insertSorted(&d.raw, event{t, x})
		return true
	}
	d.forget()
	d.w, d.mean, d.m2 = d.fold(d.w, d.mean, d.m2, d.landT, t, x)
	return true
}

// nextLandT is the next landmark in ns: startOf(land+1, step).
func (d *Decayed) nextLandT() int64 { return startOf(sat.Add(d.land, 1), d.sh.step) }

func (d *Decayed) setLand(land int64) {
	d.land, d.landT = land, startOf(land, d.sh.step)
}

// advance moves the landmark to the new cutoff and folds raw events that
// fell to or behind it.
func (d *Decayed) advance() {
	c := d.cutoff()
	if c >= d.nextLandT() {
		nl := sat.FloorDiv(c, d.sh.step)
		d.w, d.mean, d.m2 = d.rescaled(nl - d.land)
		d.setLand(nl)
		d.forget()
	}
	k := foldable(&d.raw, c)
	for _, e := range d.raw.live()[:k] {
		d.w, d.mean, d.m2 = d.fold(d.w, d.mean, d.m2, d.landT, e.t, e.v)
	}
	d.raw.popFront(k)
	if m := d.memo; m != nil {
		if m.n > k {
			m.n -= k
		} else {
			m.n = 0
		}
	}
}

// rescaled returns W, mean and M2 with the weights multiplied by
// 2^(−j·RebaseEvery): exact unless a result falls into the subnormal range.
// When W underflows to zero the state becomes empty (all weights vanished).
func (d *Decayed) rescaled(j int64) (w, mean, m2 float64) {
	e := -2000 // below the float64 range: 0
	if j < 2000 {
		e = -int(j * d.sh.spec.rebase())
	}
	w, m2 = math.Ldexp(d.w, e), math.Ldexp(d.m2, e)
	if w == 0 {
		return 0, 0, 0
	}
	return w, d.mean, m2
}

// fold applies West's weighted update for (t, x) with weight
// 2^((t − L)/h), L = landT. A weight that rounds to zero is skipped.
func (d *Decayed) fold(w, mean, m2 float64, landT, t int64, x float64) (float64, float64, float64) {
	g := math.Exp2(float64(sat.Sub(t, landT)) / float64(d.sh.spec.HalfLife))
	if g == 0 {
		return w, mean, m2
	}
	return westUpdate(w, mean, m2, g, x)
}

// westUpdate adds x with weight g > 0 to a weighted (W, mean, M2) triple
// (West, CACM 22(9), 1979). The M2 increment is written as
// δ²·g·W/(W+g), which equals g·δ·(x − new mean) but cannot turn negative
// through rounding.
func westUpdate(w, mean, m2, g, x float64) (float64, float64, float64) {
	w0 := w
	w += g
	r := g / w
	delta := x - mean
	mean += delta * r
	m2 += delta * delta * (r * w0)
	return w, mean, m2
}

// at returns W, mean, M2 as of t >= cutoff relative to the landmark of t,
// and the factor 2^(−(t − L)/h) that turns weights into decayed ones.
func (d *Decayed) at(t int64) (w, mean, m2, f float64, ok bool) {
	if d.sh == nil || !d.seen || t < d.cutoff() {
		return 0, 0, 0, 0, false
	}
	land, landT := d.land, d.landT
	if t >= d.nextLandT() {
		land = sat.FloorDiv(t, d.sh.step)
		landT = startOf(land, d.sh.step)
	}
	w, mean, m2 = d.rescaled(land - d.land)
	raw := d.raw.live()
	i := 0
	m := d.memo
	same := land == d.land // the memo is relative to the base's landmark
	if same && m != nil && m.n > 0 && m.n <= len(raw) && raw[m.n-1].t <= t {
		w, mean, m2, i = m.w, m.mean, m.m2, m.n
	}
	from := i
	for ; i < len(raw) && raw[i].t <= t; i++ {
		w, mean, m2 = d.fold(w, mean, m2, landT, raw[i].t, raw[i].v)
	}
	if same && i > from && i >= memoMin {
		if m == nil {
			m = new(foldMemo)
			d.memo = m
		}
		*m = foldMemo{n: i, w: w, mean: mean, m2: m2}
	}
	f = math.Exp2(-float64(sat.Sub(t, landT)) / float64(d.sh.spec.HalfLife))
	return w, mean, m2, f, true
}

// stats returns all four statistics as of t (see the type doc).
func (d *Decayed) stats(t int64) (count, sum, mean, variance float64) {
	if d.sh != nil && !d.seen {
		return 0, 0, math.NaN(), math.NaN()
	}
	w, mean, m2, f, ok := d.at(t)
	switch {
	case !ok:
		return math.NaN(), math.NaN(), math.NaN(), math.NaN()
	case w == 0:
		return 0, 0, math.NaN(), math.NaN()
	}
	return w * f, w * mean * f, mean, m2 / w
}

// CountAt returns the decayed count as of t; 0 when empty, NaN for
// t < cutoff.
func (d *Decayed) CountAt(t int64) float64 { c, _, _, _ := d.stats(t); return c }

// SumAt returns the decayed sum as of t; 0 when empty, NaN for t < cutoff.
func (d *Decayed) SumAt(t int64) float64 { _, s, _, _ := d.stats(t); return s }

// MeanAt returns the decayed mean as of t; NaN when empty or t < cutoff.
func (d *Decayed) MeanAt(t int64) float64 { _, _, m, _ := d.stats(t); return m }

// VarianceAt returns the decayed weighted population variance as of t; NaN
// when empty or t < cutoff.
func (d *Decayed) VarianceAt(t int64) float64 { _, _, _, v := d.stats(t); return v }

// AppendBinary appends the encoding of the state (not the spec) to dst; the
// layout is given on UnmarshalBinary.
func (d *Decayed) AppendBinary(dst []byte) ([]byte, error) {
	dst, done, err := appendHeader(dst, d.sh != nil, d.seen, kindDecayed, 0, d.maxT)
	if done {
		return dst, err
	}
	dst = appendFloat(dst, d.w)
	dst = appendFloat(dst, d.mean)
	dst = appendFloat(dst, d.m2)
	return appendEvents(dst, d.raw.live(), d.maxT, true), nil
}

// UnmarshalBinary replaces the state with the decoded one. The receiver
// must have been built with the spec the state was encoded under (the spec
// is not stored; the landmark is derived from maxT and the spec). On error
// the receiver is unchanged.
//
// Layout, version 1 (varint, uvarint: encoding/binary; float: 8 bytes
// little-endian IEEE 754):
//
//	byte     version = 1 (else ErrUnknownVersion)
//	byte     kind = 6 (else ErrWrongKind)
//	byte     flags: bit 0 = some event was added; other bits zero
//	if bit 0 is set:
//	varint   maxT
//	float    W, the folded weight relative to the landmark, in [0, 2^300]
//	float    mean, |mean| <= 2·MaxDecayedValue; 0 when W = 0
//	float    M2 in [0, 2^700]; 0 when W = 0
//	uvarint  R, then R raw events, newest first:
//	  uvarint  delta: the first time is maxT − delta, each next the
//	           previous time − delta; all > maxT − Horizon
//	  float    value, |value| <= MaxDecayedValue
//	then end of input (else ErrTrailingBytes).
func (d *Decayed) UnmarshalBinary(b []byte) error {
	return decodeTwoPass(d.sh != nil, "decayed", b, d.decode)
}

func (d *Decayed) decode(b []byte, store bool) error {
	r := wire.Decoder{B: b}
	_, maxT, ok := startState(&r, kindDecayed, flagSeen, store, d.Reset)
	if !ok {
		return r.Err
	}
	w, mean, m2 := readFloat(&r, "weight"), readFloat(&r, "mean"), readFloat(&r, "M2")
	if r.Err == nil && (!(w >= 0 && w <= maxDecodedWeight) || !(math.Abs(mean) <= maxDecodedMean) ||
		!(m2 >= 0 && m2 <= maxDecodedM2) || (w == 0 && (mean != 0 || m2 != 0))) {
		r.Fail("weights out of range")
	}
	cutoff := sat.Sub(maxT, int64(d.sh.spec.Horizon))
	readEvents(&r, &d.raw, maxT, cutoff, MaxDecayedValue, store)
	if err := r.Finish(); err != nil || !store {
		return err
	}
	d.seen, d.maxT = true, maxT
	d.setLand(sat.FloorDiv(cutoff, d.sh.step))
	d.w, d.mean, d.m2 = w, mean, m2
	return nil
}
