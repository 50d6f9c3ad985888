package tallyward

import (
	"fmt"
	"time"

	"github.com/tallyward/tallyward/window"
)

// SlidingCount counts an entity's events in a sliding window of event time,
// kept in epoch-aligned panes of width Resolution. As-of answers never
// count an event newer than the asked time; the trailing edge is exact to
// within one pane (package window states the exact set counted).
type SlidingCount struct {
	// Window is the window length. Required; a multiple of Resolution.
	Window time.Duration
	// Resolution is the pane width: finer panes cost memory, coarser panes
	// blur the trailing edge. Default: Window/60.
	Resolution time.Duration
}

func (k SlidingCount) spec(horizon int64) window.SlidingSpec {
	res := k.Resolution
	if res == 0 {
		res = k.Window / 60
	}
	return window.SlidingSpec{Window: int64(k.Window), Resolution: int64(res), Horizon: horizon}
}

// Describe implements Kind.
func (k SlidingCount) Describe() string {
	s := k.spec(0)
	return fmt.Sprintf("sliding-count window=%d resolution=%d", s.Window, s.Resolution)
}

// Validate implements Kind.
func (k SlidingCount) Validate() error { return k.spec(0).Validate() }

func (SlidingCount) input() inputKind { return inputNone }

func (k SlidingCount) newAggregate(horizon int64) aggregate {
	return &slidingCountAgg{window.NewSlidingCount(k.spec(horizon))}
}

type slidingCountAgg struct{ *window.SlidingCount }

func (a *slidingCountAgg) add(t int64, _ float64, _ uint64) bool { return a.Add(t) }
func (a *slidingCountAgg) at(t int64) float64                    { return float64(a.CountAt(t)) }
