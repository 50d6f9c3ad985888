// Package kinds is a worked example of an aggregate kind written outside
// tallyward, through the public [tallyward.Kind] and [tallyward.Aggregate]
// interfaces: it is stored, expired, replayed and erased like a built-in,
// and its tests run the same harness the built-ins pass (package
// kindtest) against a brute-force reference.
//
// [FailStreak] is the number of failed attempts since an entity's last
// good one: failed sign-ins since the account's last successful one, say,
// or declined payments since the card's last approved one. A long streak
// is a signal for a model or a reviewer, not a verdict.
//
// # What it shows
//
//   - An order-free definition, so that the answer as of t does not depend
//     on the order events arrived in: the failures with time strictly
//     after the newest success at or before t.
//   - Exact as-of answers within the horizon: events newer than
//     newest − horizon are kept raw; older ones are folded into three
//     numbers. State stays small however long the entity lives.
//   - A versioned encoding (the byte table is on [FailStreakState.UnmarshalBinary]),
//     a golden blob of version 1 in testdata/ kept for good, and a fuzzed
//     decoder.
//   - A Describe text that starts with a name no other kind uses.
package kinds

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/tallyward/tallyward"
)

// FailStreak counts an entity's failures since its last success. It takes
// a value: Feature.Value must return nonzero for a failure and 0 for a
// success (a nil Value makes every event a failure).
//
// As of t, the answer is the number of failures with time strictly after
// the newest success at or before t (all failures at or before t if there
// is none). A failure at the same time as that success does not count, so
// events at one time may arrive in any order.
//
// Reach is unbounded: a streak lasts until a success, so an entity with a
// FailStreak feature never expires by default (set Options.TTL to bound
// state; an entity idle that long then reads as new, with no streak).
type FailStreak struct{}

var (
	_ tallyward.Kind      = FailStreak{}
	_ tallyward.Aggregate = (*FailStreakState)(nil)
)

// Describe implements tallyward.Kind. The kind has no parameters; the
// name is its identity in stored state.
func (FailStreak) Describe() string { return "example.fail-streak" }

// Validate implements tallyward.Kind.
func (FailStreak) Validate() error { return nil }

// Inputs implements tallyward.Kind.
func (FailStreak) Inputs() tallyward.Inputs { return tallyward.TakesValue }

// Reach implements tallyward.Kind: unbounded.
func (FailStreak) Reach() time.Duration { return 0 }

// NewAggregate implements tallyward.Kind.
func (FailStreak) NewAggregate(horizon time.Duration) tallyward.Aggregate {
	return &FailStreakState{horizon: max(int64(horizon), 1)}
}

// FailStreakState is the per-entity state of a FailStreak feature.
//
// Invariants: tail is sorted by time (events at one time in the order
// added); if any event was added, the newest is the last of tail; every
// tail event is newer than folded.upTo, the newest folded time. Events
// leave the tail when a newer event moves newest − horizon past them.
type FailStreakState struct {
	horizon int64
	has     bool
	newest  int64
	tail    []attempt
	folded  summary
}

type attempt struct {
	t    int64
	fail bool
}

// summary is the fold of every event older than the raw tail.
type summary struct {
	any      bool  // some event was folded
	upTo     int64 // newest folded time
	success  bool  // a success was folded
	lastOK   int64 // newest folded success
	failures uint64
}

// add folds one event. Events come in time order (the tail is sorted), so
// a success starts a new streak; a failure at the time of the newest
// success does not count, whichever comes first.
func (s *summary) add(a attempt) {
	s.any, s.upTo = true, a.t
	switch {
	case !a.fail:
		s.success, s.lastOK, s.failures = true, a.t, 0
	case !s.success || a.t > s.lastOK:
		s.failures++
	}
}

// Add implements tallyward.Aggregate. value != 0 is a failure. An event
// more than the horizon behind the newest is refused (the pipeline counts
// it in Stats.TooOld): folding it could not keep answers exact.
func (a *FailStreakState) Add(t int64, value float64, _ uint64) bool {
	if a.has && t <= a.newest-a.horizon {
		return false
	}
	if !a.has || t > a.newest {
		a.has, a.newest = true, t
		cut := t - a.horizon
		i := 0
		for i < len(a.tail) && a.tail[i].t <= cut {
			a.folded.add(a.tail[i])
			i++
		}
		a.tail = slices.Delete(a.tail, 0, i)
	}
	// After every event at or before t: ties keep the order added.
	i, _ := slices.BinarySearchFunc(a.tail, t, func(e attempt, t int64) int {
		if e.t <= t {
			return -1
		}
		return 1
	})
	a.tail = slices.Insert(a.tail, i, attempt{t, value != 0})
	return true
}

// At implements tallyward.Aggregate: the streak as of t. Exact for any t
// at or after the newest folded event (so for every t within the horizon
// of the newest); NaN for an older t, which only a late event applied
// under ApplyLate asks.
func (a *FailStreakState) At(t int64, _ uint64) float64 {
	if a.folded.any && t < a.folded.upTo {
		return math.NaN()
	}
	s := a.folded
	for _, e := range a.tail {
		if e.t > t {
			break
		}
		s.add(e)
	}
	return float64(s.failures)
}

// Newest implements tallyward.Aggregate.
func (a *FailStreakState) Newest() (int64, bool) { return a.newest, a.has }

// SizeBytes implements tallyward.Aggregate.
func (a *FailStreakState) SizeBytes() int { return 96 + 16*cap(a.tail) }

// Encoding versions. Version 1 is pinned by testdata/fail-streak-v1.bin.
const version1 = 1

const (
	flagHas     = 1 << iota // an event was added
	flagFolded              // some events were folded
	flagSuccess             // a success was folded
	flagsKnown  = flagHas | flagFolded | flagSuccess
)

// AppendBinary implements tallyward.Aggregate; the layout is on
// UnmarshalBinary.
func (a *FailStreakState) AppendBinary(dst []byte) ([]byte, error) {
	var flags byte
	if a.has {
		flags |= flagHas
	}
	if a.folded.any {
		flags |= flagFolded
	}
	if a.folded.success {
		flags |= flagSuccess
	}
	dst = append(dst, version1, flags)
	if !a.has {
		return dst, nil
	}
	dst = binary.AppendVarint(dst, a.newest)
	if a.folded.any {
		dst = binary.AppendUvarint(dst, uint64(a.newest)-uint64(a.folded.upTo))
		if a.folded.success {
			dst = binary.AppendUvarint(dst, uint64(a.folded.upTo)-uint64(a.folded.lastOK))
		}
		dst = binary.AppendUvarint(dst, a.folded.failures)
	}
	dst = binary.AppendUvarint(dst, uint64(len(a.tail)))
	for _, e := range a.tail {
		dst = binary.AppendUvarint(dst, uint64(a.newest)-uint64(e.t))
		var fail byte
		if e.fail {
			fail = 1
		}
		dst = append(dst, fail)
	}
	return dst, nil
}

// ErrEncoding is wrapped by every decoding error.
var ErrEncoding = errors.New("fail-streak state")

// UnmarshalBinary implements tallyward.Aggregate. Version 1:
//
//	byte     version (1)
//	byte     flags: 1 an event was added, 2 events were folded,
//	         4 a success was folded (2 needs 1, 4 needs 2)
//	if 1:
//	  varint   newest event time (Unix ns)
//	  if 2:
//	    uvarint  newest − newest folded time
//	    if 4: uvarint  newest folded time − newest folded success
//	    uvarint  folded failures after that success
//	  uvarint  n, the raw events (>= 1; the last is the newest)
//	  n times: uvarint newest − time (non-increasing, last 0), byte 1 failure / 0 success
//
// Times are differences from the newest, so they stay short. Unknown
// versions or flags, truncated input, trailing bytes and inconsistent
// fields are errors wrapping ErrEncoding; the receiver is then unchanged.
func (a *FailStreakState) UnmarshalBinary(b []byte) error {
	d := decoder{b: b}
	if v := d.byte(); d.err == nil && v != version1 {
		return fmt.Errorf("%w: unknown version %d", ErrEncoding, v)
	}
	flags := d.byte()
	if d.err == nil && (flags&^flagsKnown != 0 || flags&flagFolded != 0 && flags&flagHas == 0 || flags&flagSuccess != 0 && flags&flagFolded == 0) {
		return fmt.Errorf("%w: bad flags %#x", ErrEncoding, flags)
	}
	var (
		has    = flags&flagHas != 0
		newest int64
		folded summary
		tail   []attempt
	)
	if has {
		newest = d.varint()
		if flags&flagFolded != 0 {
			folded.any = true
			folded.upTo = d.before(newest)
			if flags&flagSuccess != 0 {
				folded.success = true
				folded.lastOK = d.before(folded.upTo)
			}
			folded.failures = d.uvarint()
		}
		n := d.uvarint()
		if d.err == nil && (n == 0 || n > uint64(len(d.b))/2) {
			return fmt.Errorf("%w: %d raw events in %d bytes", ErrEncoding, n, len(d.b))
		}
		tail = make([]attempt, 0, n)
		for range n {
			t := d.before(newest)
			f := d.byte()
			if d.err != nil {
				break
			}
			switch {
			case f > 1:
				return fmt.Errorf("%w: bad failure byte %d", ErrEncoding, f)
			case len(tail) > 0 && t < tail[len(tail)-1].t:
				return fmt.Errorf("%w: raw events out of order", ErrEncoding)
			case folded.any && t <= folded.upTo:
				return fmt.Errorf("%w: raw event not newer than the folded ones", ErrEncoding)
			}
			tail = append(tail, attempt{t, f == 1})
		}
		if d.err == nil && tail[len(tail)-1].t != newest {
			return fmt.Errorf("%w: the newest event is not the last raw one", ErrEncoding)
		}
	}
	if d.err == nil && len(d.b) != 0 {
		return fmt.Errorf("%w: %d trailing bytes", ErrEncoding, len(d.b))
	}
	if d.err != nil {
		return fmt.Errorf("%w: %w", ErrEncoding, d.err)
	}
	a.has, a.newest, a.folded, a.tail = has, newest, folded, tail
	return nil
}

// decoder reads b; the first error sticks and later reads return zero.
type decoder struct {
	b   []byte
	err error
}

var errShort = errors.New("truncated")

func (d *decoder) byte() byte {
	if d.err != nil || len(d.b) == 0 {
		d.err = cmpErr(d.err, errShort)
		return 0
	}
	v := d.b[0]
	d.b = d.b[1:]
	return v
}

func (d *decoder) uvarint() uint64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.b)
	if n <= 0 {
		d.err = errShort
		if n < 0 {
			d.err = errors.New("varint overflows 64 bits")
		}
		return 0
	}
	d.b = d.b[n:]
	return v
}

// varint reads what binary.AppendVarint wrote: a zig-zag uvarint.
func (d *decoder) varint() int64 {
	u := d.uvarint()
	return int64(u>>1) ^ -int64(u&1)
}

// before reads a difference back from ref and returns ref minus it,
// refusing differences that would wrap below the smallest time.
func (d *decoder) before(ref int64) int64 {
	delta := d.uvarint()
	// ref − delta >= MinInt64 ⇔ delta <= ref + 2⁶³, computed unsigned.
	if d.err == nil && delta > uint64(ref)+1<<63 {
		d.err = errors.New("time difference out of range")
	}
	return int64(uint64(ref) - delta)
}

func cmpErr(err, def error) error {
	if err != nil {
		return err
	}
	return def
}
