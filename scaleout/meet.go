package scaleout

import (
	"errors"
	"fmt"
	"math"
)

// ErrMeet is wrapped by the errors Meeting.Add returns.
var ErrMeet = errors.New("scaleout: partial row")

// Meeting puts an event's partial rows back together. Each stage of a
// re-keyed topology computes the features of one entity of the event and
// emits a partial row keyed by the event's id; a Meeting holds the parts
// of an id until all Parts have come, then hands them over in part order.
//
// A repeated part (at-least-once output) is checked against the one held
// and dropped; a part of an id already complete is dropped and counted.
// Parts that never complete stay held: Expire drops those of events older
// than a time, counting them.
//
// A Meeting keeps its state in memory: after a restart, feed it again
// from the partial-row topics' start or from a point before the oldest
// held event. It is not safe for concurrent use.
type Meeting struct {
	// Parts is the number of partial rows per event. Required (> 0).
	Parts int
	// Emit receives each complete event: its id, time and one value
	// slice per part. Required.
	Emit func(id string, at int64, parts [][]float64)

	held map[string]*meetingRow
	done map[string]int64 // complete ids, by event time, until Expire
	st   MeetingStats
}

// MeetingStats counts what a Meeting did.
type MeetingStats struct {
	Complete int64 // events handed to Emit
	Repeated int64 // parts received more than once (dropped)
	Expired  int64 // incomplete events dropped by Expire
	Held     int   // incomplete events held now
}

type meetingRow struct {
	at    int64
	got   int
	parts [][]float64
}

// Add records part (0-based) of event id at time at. It returns an error
// wrapping ErrMeet for a part out of range or a repeated part whose
// values differ from the first (a sign of nondeterminism upstream).
func (m *Meeting) Add(id string, at int64, part int, values []float64) error {
	if m.Parts <= 0 || m.Emit == nil {
		return fmt.Errorf("%w: Meeting needs Parts > 0 and Emit", ErrMeet)
	}
	if part < 0 || part >= m.Parts {
		return fmt.Errorf("%w: part %d of %q outside [0, %d)", ErrMeet, part, id, m.Parts)
	}
	if m.held == nil {
		m.held, m.done = map[string]*meetingRow{}, map[string]int64{}
	}
	if _, ok := m.done[id]; ok {
		m.st.Repeated++
		return nil
	}
	r := m.held[id]
	if r == nil {
		r = &meetingRow{at: at, parts: make([][]float64, m.Parts)}
		m.held[id] = r
	}
	if old := r.parts[part]; old != nil {
		m.st.Repeated++
		if !sameBits(old, values) {
			return fmt.Errorf("%w: part %d of %q repeated with other values", ErrMeet, part, id)
		}
		return nil
	}
	r.parts[part] = append([]float64(nil), values...)
	r.got++
	if r.got == m.Parts {
		delete(m.held, id)
		m.done[id] = r.at
		m.st.Complete++
		m.Emit(id, r.at, r.parts)
	}
	return nil
}

// Expire drops incomplete events with a time before t, and forgets
// complete ones before t (a part of theirs arriving later is then held
// as a new event).
func (m *Meeting) Expire(t int64) {
	for id, r := range m.held {
		if r.at < t {
			delete(m.held, id)
			m.st.Expired++
		}
	}
	for id, at := range m.done {
		if at < t {
			delete(m.done, id)
		}
	}
}

// Stats returns the counts so far.
func (m *Meeting) Stats() MeetingStats {
	s := m.st
	s.Held = len(m.held)
	return s
}

func sameBits(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}
