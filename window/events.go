package window

import (
	"encoding/binary"
	"math"

	"github.com/tallyward/tallyward/internal/wire"
)

// Raw events kept with exact times between the cutoff and the newest time
// are handled the same way by every aggregate: a time-sorted seq[event].

// insertSorted puts e after every event with time <= e.t; ties keep arrival
// order. Events usually arrive in order, so the scan starts at the back.
func insertSorted(s *seq[event], e event) {
	raw := s.live()
	i := len(raw)
	for i > 0 && raw[i-1].t > e.t {
		i--
	}
	if i == len(raw) {
		s.push(e)
		return
	}
	s.insert(i, e)
}

// foldable returns how many leading events have time <= cutoff.
func foldable(s *seq[event], cutoff int64) int {
	raw := s.live()
	k := 0
	for k < len(raw) && raw[k].t <= cutoff {
		k++
	}
	return k
}

// appendEvents encodes raw events newest first as
// uvarint R, then R × (uvarint delta [, float value]), where the first time
// is maxT − delta and each next is the previous time − delta.
func appendEvents(dst []byte, raw []event, maxT int64, values bool) []byte {
	dst = binary.AppendUvarint(dst, uint64(len(raw)))
	prev := maxT
	for i := len(raw) - 1; i >= 0; i-- {
		dst = binary.AppendUvarint(dst, uint64(prev-raw[i].t))
		prev = raw[i].t
		if values {
			dst = appendFloat(dst, raw[i].v)
		}
	}
	return dst
}

// readEvents decodes what appendEvents wrote, checking that every time lies
// in (cutoff, maxT]. Values are present when limit > 0 and must satisfy
// |v| <= limit. It stores into s only when store is set; it returns the
// number of events and the oldest time (maxT when there are none).
func readEvents(r *wire.Decoder, s *seq[event], maxT, cutoff int64, limit float64, store bool) (int, int64) {
	values := limit > 0
	per := 1
	if values {
		per = 9
	}
	n := r.Count(per, math.MaxUint64)
	if store {
		s.setLen(n)
	}
	prev := maxT
	for i := n - 1; i >= 0 && r.Err == nil; i-- {
		d := r.Uvarint()
		t := prev - int64(d)
		if d > math.MaxInt64 || t > prev || t <= cutoff {
			r.Fail("raw event at or behind the cutoff")
			break
		}
		var v float64
		if values {
			if v = readFloat(r, "raw value"); !(math.Abs(v) <= limit) {
				r.Fail("raw value out of range")
			}
		}
		if store {
			*s.at(i) = event{t: t, v: v}
		}
		prev = t
	}
	return n, prev
}
