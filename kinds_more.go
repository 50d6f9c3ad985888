package tallyward

import (
	"cmp"
	"fmt"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/sketch"
	"github.com/tallyward/tallyward/window"
)

// DistinctEver counts the distinct items (Feature.Item) an entity has had
// over its whole history, with no window: distinct devices ever seen for
// an account, distinct cards ever used from an address. Near-exact while
// the set is small (a sparse HyperLogLog), then a HyperLogLog estimate
// with relative standard error 1.04/√2^Precision (package sketch).
//
// Its reach is unbounded: an entity with it never expires by default (set
// Options.TTL to bound state; an expired entity then reads as new).
type DistinctEver struct {
	// Precision is the HyperLogLog precision p (4..18). Default: 12.
	Precision uint8
}

func (k DistinctEver) spec(horizon time.Duration) sketch.DistinctEverSpec {
	return sketch.DistinctEverSpec{Precision: cmp.Or(k.Precision, 12), Horizon: horizon} // 12: the sketch package's default
}

// Describe implements Kind.
func (k DistinctEver) Describe() string {
	return fmt.Sprintf("distinct-ever precision=%d", k.spec(0).Precision)
}

// Validate implements Kind.
func (k DistinctEver) Validate() error { return k.spec(0).Validate() }

// Inputs implements Kind.
func (DistinctEver) Inputs() Inputs { return TakesItem }

// Reach implements Kind: unbounded.
func (DistinctEver) Reach() time.Duration { return 0 }

// CheckHorizon implements HorizonChecker: the horizon is stored and
// bounded by the summary.
func (k DistinctEver) CheckHorizon(horizon time.Duration) error { return k.spec(horizon).Validate() }

// NewAggregate implements Kind.
func (k DistinctEver) NewAggregate(horizon time.Duration) Aggregate {
	return everAgg{built(sketch.NewDistinctEver(k.spec(horizon)))}
}

type everAgg struct{ *sketch.DistinctEver }

func (a everAgg) Add(t int64, _ float64, h uint64) bool { return a.DistinctEver.Add(t, h) }
func (a everAgg) At(t int64, _ uint64) float64          { return float64(a.DistinctAt(t)) }

// Surge compares an entity's event rate in a short Window with its own
// long-run rate, decayed with HalfLife, smoothed so that a new entity
// reads exactly 1 (package window states the formula):
//
//	(c + α) / (D·Window·ln2/HalfLife + α)
//
// with c the events in the window and D the decayed count. 1 means the
// entity's usual pace, large values a burst against its own history,
// small values a lull. Unlike Velocity, the baseline is not a second
// window but the entity's whole history, weighted towards the recent.
type Surge struct {
	// Window is the short window. Required; a multiple of Resolution.
	Window time.Duration
	// HalfLife of the baseline: an event's weight halves every HalfLife.
	// Required; usually many times Window.
	HalfLife time.Duration
	// Resolution is the pane width of the window. Default: Window/10.
	Resolution time.Duration
	// Smoothing is α, the pseudo-count. Default: 1.
	Smoothing float64
}

func (k Surge) spec(horizon time.Duration) window.SurgeSpec {
	return window.SurgeSpec{Window: k.Window, HalfLife: k.HalfLife, Resolution: cmp.Or(k.Resolution, max(k.Window/10, 1)),
		Horizon: horizon, Smoothing: cmp.Or(k.Smoothing, 1)} // the window package's defaults, spelled out
}

// Describe implements Kind.
func (k Surge) Describe() string {
	s := k.spec(0)
	return fmt.Sprintf("surge window=%d half-life=%d resolution=%d smoothing=%g", s.Window, s.HalfLife, s.Resolution, s.Smoothing)
}

// Validate implements Kind.
func (k Surge) Validate() error { return k.spec(0).Validate() }

// Inputs implements Kind.
func (Surge) Inputs() Inputs { return 0 }

// Reach implements Kind: the window, or 64 half-lives of the baseline
// (a weight then below 2^-64 of its start), whichever is longer.
func (k Surge) Reach() time.Duration {
	return max(k.Window, time.Duration(sat.Mul(int64(k.HalfLife), 64)))
}

// NewAggregate implements Kind.
func (k Surge) NewAggregate(horizon time.Duration) Aggregate {
	return surgeAgg{built(window.NewSurge(k.spec(horizon)))}
}

type surgeAgg struct{ *window.Surge }

func (a surgeAgg) Add(t int64, _ float64, _ uint64) bool { return a.Surge.Add(t) }
func (a surgeAgg) At(t int64, _ uint64) float64          { return a.RatioAt(t) }
