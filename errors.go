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

	numReasons = 3
)

func (r Reason) String() string {
	switch r {
	case ZeroTime:
		return "zero-time"
	case BadValue:
		return "bad-value"
	case FutureTime:
		return "future-time"
	}
	return fmt.Sprintf("Reason(%d)", r)
}

// Sentinel errors. Errors returned by the pipeline wrap these; test with
// errors.Is.
var (
	// ErrRejected is wrapped by every *RejectError.
	ErrRejected = errors.New("tallyward: event rejected")
	// ErrZeroTime, ErrBadValue and ErrFutureTime are the rejection classes.
	ErrZeroTime   = errors.New("tallyward: event time is zero")
	ErrBadValue   = errors.New("tallyward: feature value is NaN or infinite")
	ErrFutureTime = errors.New("tallyward: event time too far in the future")
	// ErrLate is returned for a late event that the lateness policy drops
	// or diverts.
	ErrLate = errors.New("tallyward: event is late")
	// ErrNotEager is returned by Score on a Settled pipeline.
	ErrNotEager = errors.New("tallyward: Score needs Eager mode")
	// ErrClosed is returned after Close.
	ErrClosed = errors.New("tallyward: pipeline is closed")
	// ErrDefinitionChanged is wrapped by the error Open returns when a
	// stored feature definition differs from the one given.
	ErrDefinitionChanged = errors.New("tallyward: feature definition changed")
	// ErrFlushed is returned for events after Flush: the watermark is at
	// +infinity and every event would be late.
	ErrFlushed = errors.New("tallyward: pipeline was flushed")
)

var reasonErr = [numReasons]error{ErrZeroTime, ErrBadValue, ErrFutureTime}

// RejectError describes one rejected event. It matches ErrRejected and the
// sentinel of its reason under errors.Is.
type RejectError struct {
	Reason  Reason
	Seq     uint64 // the event's position in the source
	Time    int64  // the event's time
	Feature string // for BadValue: the feature whose value was bad
}

func (e *RejectError) Error() string {
	msg := fmt.Sprintf("tallyward: event %d (time %d) rejected: %v", e.Seq, e.Time, e.Reason)
	if e.Feature != "" {
		msg += " in feature " + e.Feature
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
