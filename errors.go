package tallyward

import (
	"errors"
	"fmt"
)

// Reason classifies a rejected event. Values are frozen: they index the
// persisted counters.
type Reason uint8

const (
	// ZeroTime: the event's time is 0 (usually an unset field).
	ZeroTime Reason = 0
	// BadValue: a feature's value is NaN or infinite.
	BadValue Reason = 1
	// FutureTime: the event's time is beyond FutureSkew ahead of the newest
	// event time or of the live clock.
	FutureTime Reason = 2
	// OutOfRange: the event's time is outside [Options.EarliestTime,
	// Options.LatestTime].
	OutOfRange Reason = 3
	// PastTime: in live mode, the event's time is more than
	// Options.PastSkew behind the clock.
	PastTime Reason = 4

	numReasons = 5
)

func (r Reason) String() string {
	switch r {
	case ZeroTime:
		return "zero-time"
	case BadValue:
		return "bad-value"
	case FutureTime:
		return "future-time"
	case OutOfRange:
		return "out-of-range"
	case PastTime:
		return "past-time"
	}
	return fmt.Sprintf("Reason(%d)", r)
}

// Sentinel errors. Errors returned by the pipeline wrap these; test with
// errors.Is.
var (
	// ErrRejected is wrapped by every *RejectError.
	ErrRejected = errors.New("tallyward: event rejected")
	// ErrZeroTime, ErrBadValue, ErrFutureTime, ErrOutOfRange and
	// ErrPastTime are the rejection classes.
	ErrZeroTime   = errors.New("tallyward: event time is zero")
	ErrBadValue   = errors.New("tallyward: feature value is NaN, infinite or beyond ±1e30")
	ErrFutureTime = errors.New("tallyward: event time too far in the future")
	ErrOutOfRange = errors.New("tallyward: event time outside the plausible range")
	ErrPastTime   = errors.New("tallyward: event time too far behind the clock")
	// ErrLate is returned for a late event that the lateness policy drops
	// or diverts. If every event turns out late, a stray event may have
	// set the newest time far ahead: see Pipeline.ResetNewest.
	ErrLate = errors.New("tallyward: event is late")
	// ErrNotEager is returned by Score on a Settled pipeline.
	ErrNotEager = errors.New("tallyward: Score needs Eager mode")
	// ErrClosed is returned after Close.
	ErrClosed = errors.New("tallyward: pipeline is closed")
	// ErrDefinitionChanged is wrapped by the error Open returns when a
	// stored feature definition differs from the one given.
	ErrDefinitionChanged = errors.New("tallyward: feature definition changed")
	// ErrReentered is returned by a call into a pipeline made from inside
	// one of its callbacks (Spec.Emit, Spec.OnLate, or the spec's Time,
	// Key, Where, Value and Item functions), and by a call into a Live made
	// from inside Spec.Emit or Spec.OnLate: the pipeline is in the middle
	// of an event, whose inputs or row would be overwritten (under Live,
	// the call would wait for itself). Nothing is changed.
	ErrReentered = errors.New("tallyward: called from inside Spec.Emit or Spec.OnLate")
	// ErrUnknownFeature is wrapped by the error Open returns when
	// Options.ResetFeatures names no feature, given or stored.
	ErrUnknownFeature = errors.New("tallyward: unknown feature")
	// ErrItemKey is wrapped by the error Open returns when the item hash
	// key given in Options does not fit the store.
	ErrItemKey = errors.New("tallyward: item hash key does not match the store")
	// ErrFlushed is returned for events after Flush: the watermark is at
	// +infinity and every event would be late.
	ErrFlushed = errors.New("tallyward: pipeline was flushed")
)

var reasonErr = [numReasons]error{ErrZeroTime, ErrBadValue, ErrFutureTime, ErrOutOfRange, ErrPastTime}

// RejectError describes one rejected event. It matches ErrRejected and the
// sentinel of its reason under errors.Is.
type RejectError struct {
	Reason  Reason
	Seq     uint64 // the event's position in the source
	Time    int64  // the event's time
	Feature string // for BadValue: the feature whose value was bad
	// Limit, for the time reasons (FutureTime, OutOfRange, PastTime), is
	// the bound the time crossed; FromNewest says whether that bound came
	// from the newest event time seen rather than the clock or an option.
	Limit      int64
	FromNewest bool
}

func (e *RejectError) Error() string {
	msg := fmt.Sprintf("tallyward: event %d (time %d) rejected: %v", e.Seq, e.Time, e.Reason)
	if e.Feature != "" {
		msg += " in feature " + e.Feature
	}
	switch e.Reason {
	case FutureTime, OutOfRange, PastTime:
		msg += fmt.Sprintf(" (limit %d", e.Limit)
		if e.FromNewest {
			// The one case an operator may have to act on: a stray
			// event moved the newest time.
			msg += ", from the newest event time; if that time is wrong, see Pipeline.ResetNewest"
		}
		msg += ")"
	}
	return msg
}

// Is reports whether target is ErrRejected or this reason's sentinel.
func (e *RejectError) Is(target error) bool {
	return target == ErrRejected || (int(e.Reason) < len(reasonErr) && target == reasonErr[e.Reason])
}

// BatchError names the event that made Live.SubmitBatch refuse a whole
// batch. It unwraps to that event's error.
type BatchError struct {
	Index int // position in the batch
	Err   error
}

func (e *BatchError) Error() string {
	return fmt.Sprintf("tallyward: batch event %d: %v", e.Index, e.Err)
}

// Unwrap returns the event's error.
func (e *BatchError) Unwrap() error { return e.Err }

// LateError describes an event refused as late: its time is below the
// watermark. It matches ErrLate under errors.Is.
type LateError struct {
	Time, Watermark int64
}

func (e *LateError) Error() string {
	return fmt.Sprintf("tallyward: event time %d is below the watermark %d (late)", e.Time, e.Watermark)
}

// Is reports whether target is ErrLate.
func (e *LateError) Is(target error) bool { return target == ErrLate }
