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

// RecencySpec defines first/last-seen tracking and gap-based sessions. A
// zero field means its default.
type RecencySpec struct {
	// Gap, > 0: two consecutive events (in time order) at most Gap apart
	// belong to the same session. Default 30 minutes (common practice for
	// web sessions).
	Gap time.Duration
	// Horizon as in SlidingSpec: how far behind the newest added time
	// queries stay exact, >= 0. Default 0.
	Horizon time.Duration
}

// DefaultGap is RecencySpec's default Gap.
const DefaultGap = 30 * time.Minute

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil.
func (s RecencySpec) Validate() error {
	s.Gap = cmp.Or(s.Gap, DefaultGap)
	e := newSpecErrs("RecencySpec")
	e.positive("Gap", s.Gap)
	e.nonNegative("Horizon", s.Horizon)
	return e.err()
}

// Recency tracks when an entity was first and last seen and how many events
// its current session holds.
//
// Sessions: sort the events by time; a session is a maximal run in which
// each event is at most Gap after the previous one. As of t, the current
// session is the one holding the newest event at or before t, provided
// t − that event <= Gap; otherwise there is no current session (count 0).
//
// Let maxT = newest time added, cutoff = maxT − Horizon. Events with time
// > cutoff are kept raw; older ones are folded into the first time, the
// newest folded time and the folded session (start, last, count) holding it.
// Queries at t >= cutoff are exact, and so are queries at t no older than
// the newest folded time. Older queries cannot be answered: LastSeenAt and
// SinceLastAt report false and SessionCountAt returns 0.
//
// One case loses events: a late event (time <= cutoff) landing less than
// Gap before the start of the folded session joins it, but if it also lies
// within Gap of an earlier session, that earlier session (no longer kept)
// is not merged in, so the session count undercounts. Events that arrive
// within Horizon of the newest time never cause it.
//
// Build with NewRecency; the zero value ignores Add. Not safe for
// concurrent use.
//
// Invariants: !seen implies an empty state; first <= every retained time;
// folded implies sStart <= sLast <= cutoff and sCount >= 1; raw is sorted
// with cutoff < t <= maxT.
type Recency struct {
	spec  RecencySpec
	valid bool

	seen   bool
	maxT   int64
	first  int64
	folded bool
	sStart int64
	sLast  int64
	sCount uint64
	raw    seq[event]          // values unused
	rinl   [inlineEvents]event // raw's first storage; never copied once built
}

// session is a gap-based session being extended in time order.
type session struct {
	start, last int64
	count       uint64
}

// NewRecency returns an empty recency tracker over spec, or the errors of
// spec.Validate.
func NewRecency(spec RecencySpec) (*Recency, error) {
	r := new(Recency)
	if err := r.Init(spec); err != nil {
		return nil, err
	}
	return r, nil
}

// Init makes r an empty tracker over spec in place, whatever r held, or
// returns the errors of spec.Validate (r is then unusable, like the zero
// value). It allocates nothing; r must not be copied afterwards.
func (r *Recency) Init(spec RecencySpec) error {
	*r = Recency{}
	if err := spec.Validate(); err != nil {
		return err
	}
	spec.Gap = cmp.Or(spec.Gap, DefaultGap)
	r.spec, r.valid = spec, true
	r.raw.buf = r.rinl[:0]
	return nil
}

// Spec returns the spec the aggregate was built with, defaults applied.
func (r *Recency) Spec() RecencySpec { return r.spec }

// Reset empties the aggregate and keeps its spec and storage.
func (r *Recency) Reset() {
	r.seen, r.maxT, r.first, r.folded = false, 0, 0, false
	r.sStart, r.sLast, r.sCount = 0, 0, 0
	r.raw.clear()
}

// Newest returns the largest time added; ok is false (and t 0) if none.
func (r *Recency) Newest() (t int64, ok bool) { return r.maxT, r.seen }

// SizeBytes returns the approximate heap footprint in bytes.
func (r *Recency) SizeBytes() int {
	return int(unsafe.Sizeof(*r)) + r.raw.sizeBytes(int(unsafe.Sizeof(event{})), r.rinl[:])
}

func (r *Recency) cutoff() int64 { return sat.Sub(r.maxT, int64(r.spec.Horizon)) }

// within reports whether b − a <= Gap for a <= b, without overflow.
func (r *Recency) within(a, b int64) bool { return sat.Sub(b, a) <= int64(r.spec.Gap) }

// Add records one event at time t. It returns false only when the spec is
// invalid.
func (r *Recency) Add(t int64) bool {
	if !r.valid {
		return false
	}
	switch {
	case !r.seen:
		r.seen, r.maxT, r.first = true, t, t
	case t > r.maxT:
		r.maxT = t
		k := foldable(&r.raw, r.cutoff())
		for _, e := range r.raw.live()[:k] {
			r.fold(e.t)
		}
		r.raw.popFront(k)
	}
	r.first = min(r.first, t)
	if t > r.cutoff() {
		insertSorted(&r.raw, event{t: t})
	} else {
		r.fold(t)
	}
	return true
}

// extend adds t >= s.last to a session in time order.
func (r *Recency) extend(s session, t int64) session {
	if s.count > 0 && r.within(s.last, t) {
		return session{s.start, t, s.count + 1}
	}
	return session{t, t, 1}
}

// fold adds t <= cutoff to the folded session (see the type doc).
func (r *Recency) fold(t int64) {
	s := session{r.sStart, r.sLast, r.sCount}
	switch {
	case !r.folded || t >= s.last:
		s = r.extend(s, t)
	case t >= s.start:
		s.count++
	case r.within(t, s.start):
		s.start, s.count = t, s.count+1
	default: // an older session: the current one is unchanged
	}
	r.folded, r.sStart, r.sLast, r.sCount = true, s.start, s.last, s.count
}

// sessionAt returns the session holding the newest event <= t, and whether
// the state can answer as of t.
func (r *Recency) sessionAt(t int64) (session, bool) {
	var s session
	if !r.valid || !r.seen {
		return s, r.valid
	}
	if r.folded {
		s = session{r.sStart, r.sLast, r.sCount}
	}
	if t < r.cutoff() {
		return s, r.folded && t >= r.sLast
	}
	for _, e := range r.raw.live() {
		if e.t > t {
			break
		}
		s = r.extend(s, e.t)
	}
	return s, true
}

// FirstSeen returns the earliest time added; false if none.
func (r *Recency) FirstSeen() (int64, bool) { return r.first, r.seen }

// FirstSeenAt returns the earliest time added if it is <= t; false if no
// event at or before t was added. Always exact.
func (r *Recency) FirstSeenAt(t int64) (int64, bool) {
	if !r.seen || r.first > t {
		return 0, false
	}
	return r.first, true
}

// LastSeen returns the newest time added; false if none.
func (r *Recency) LastSeen() (int64, bool) { return r.maxT, r.seen }

// LastSeenAt returns the newest event time <= t; false if there is none or
// t is older than the state can answer (see the type doc).
func (r *Recency) LastSeenAt(t int64) (int64, bool) {
	s, ok := r.sessionAt(t)
	if !ok || s.count == 0 {
		return 0, false
	}
	return s.last, true
}

// SinceLastAt returns t − LastSeenAt(t) (saturated), with its ok.
func (r *Recency) SinceLastAt(t int64) (int64, bool) {
	last, ok := r.LastSeenAt(t)
	if !ok {
		return 0, false
	}
	return sat.Sub(t, last), true
}

// SessionCountAt returns the number of events in the current session as of
// t: 0 when the newest event <= t is more than Gap before t, when there is
// none, or when t cannot be answered (see the type doc).
func (r *Recency) SessionCountAt(t int64) uint64 {
	s, ok := r.sessionAt(t)
	if !ok || s.count == 0 || !r.within(s.last, t) {
		return 0
	}
	return s.count
}

const flagFolded byte = 2

// AppendBinary appends the encoding of the state (not the spec) to dst; the
// layout is given on UnmarshalBinary.
func (r *Recency) AppendBinary(dst []byte) ([]byte, error) {
	var flags byte
	if r.folded {
		flags = flagFolded
	}
	dst, done, err := appendHeader(dst, r.valid, r.seen, kindRecency, flags, r.maxT)
	if done {
		return dst, err
	}
	dst = binary.AppendUvarint(dst, uint64(r.maxT)-uint64(r.first))
	if r.folded {
		dst = binary.AppendUvarint(dst, uint64(r.maxT)-uint64(r.sLast))
		dst = binary.AppendUvarint(dst, uint64(r.sLast)-uint64(r.sStart))
		dst = binary.AppendUvarint(dst, r.sCount-1)
	}
	return appendEvents(dst, r.raw.live(), r.maxT, false), nil
}

// UnmarshalBinary replaces the state with the decoded one. The receiver
// must have been built with the spec the state was encoded under (the spec
// is not stored). On error the receiver is unchanged.
//
// Layout, version 1 (varint, uvarint: encoding/binary; differences are
// taken modulo 2^64 and must not wrap):
//
//	byte     version = 1 (else ErrUnknownVersion)
//	byte     kind = 8 (else ErrWrongKind)
//	byte     flags: bit 0 = some event was added, bit 1 = some event was
//	         folded (only with bit 0); other bits zero
//	if bit 0 is set:
//	varint   maxT
//	uvarint  maxT − first
//	if bit 1 is set:
//	  uvarint  maxT − sLast (sLast <= maxT − Horizon)
//	  uvarint  sLast − sStart (sStart >= first)
//	  uvarint  sCount − 1
//	uvarint  R, then R raw event times, newest first, each a uvarint delta:
//	         the first is maxT − delta, each next the previous − delta; all
//	         > maxT − Horizon and >= first
//	then end of input (else ErrTrailingBytes).
func (r *Recency) UnmarshalBinary(b []byte) error {
	return decodeTwoPass(r.valid, "recency", b, r.decode)
}

// back returns x − d for an unsigned d, or fails if that is below lo.
func back(rd *wire.Decoder, x int64, d uint64, lo int64, what string) int64 {
	if rd.Err == nil && d > uint64(x)-uint64(lo) {
		rd.Fail("%s out of range", what)
		return x
	}
	return int64(uint64(x) - d)
}

func (r *Recency) decode(b []byte, store bool) error {
	rd := wire.Decoder{B: b}
	flags, maxT, ok := startState(&rd, kindRecency, flagSeen|flagFolded, store, r.Reset)
	if !ok {
		return rd.Err
	}
	cutoff := sat.Sub(maxT, int64(r.spec.Horizon))
	first := back(&rd, maxT, rd.Uvarint(), math.MinInt64, "first")
	var s session
	folded := flags&flagFolded != 0
	if folded {
		s.last = back(&rd, maxT, rd.Uvarint(), first, "session last")
		s.start = back(&rd, s.last, rd.Uvarint(), first, "session start")
		s.count = rd.Uvarint() + 1
		if rd.Err == nil && (s.count == 0 || s.last > cutoff) {
			rd.Fail("folded session out of range")
		}
	}
	n, oldest := readEvents(&rd, &r.raw, maxT, cutoff, 0, store)
	if rd.Err == nil && (oldest < first || (!folded && (n == 0 || oldest != first))) {
		rd.Fail("first time inconsistent with the events")
	}
	if err := rd.Finish(); err != nil || !store {
		return err
	}
	r.seen, r.maxT, r.first = true, maxT, first
	r.folded, r.sStart, r.sLast, r.sCount = folded, s.start, s.last, s.count
	return nil
}
