package tallyward

import "time"

// Clock tells the live driver the current time in Unix nanoseconds. Only
// the live driver reads a clock; the core takes every time as an argument.
type Clock interface {
	Now() int64
}

// SystemClock is the wall clock: the only place the engine reads it.
type SystemClock struct{}

// Now implements Clock.
func (SystemClock) Now() int64 { return time.Now().UnixNano() }
