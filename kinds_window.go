package tallyward

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/window"
)

// DecayStat selects what a Decayed feature reports. Values are frozen
// (they appear in stored definitions).
type DecayStat uint8

const (
	// DecayedCount is the exponentially decayed number of events.
	DecayedCount DecayStat = 0
	// DecayedSum is the decayed sum of values.
	DecayedSum DecayStat = 1
	// DecayedMean is the decayed (weighted) mean of values; NaN if empty.
	DecayedMean DecayStat = 2
	// DecayedVariance is the decayed population variance of values
	// (weighted second moment about the weighted mean); NaN if empty.
	DecayedVariance DecayStat = 3
)

var decayStatNames = [...]string{"count", "sum", "mean", "variance"}

func (s DecayStat) String() string {
	if int(s) < len(decayStatNames) {
		return decayStatNames[s]
	}
	return fmt.Sprintf("DecayStat(%d)", s)
}

// Decayed is an exponentially decayed statistic of an entity's events: an
// event's weight halves every HalfLife of event time. It is computed by
// forward decay, so the answer does not depend on the order events were
// added in (up to float rounding; the pipeline's canonical order in
// Settled mode makes it bit-identical), and it never overflows: the
// landmark moves at event-time points fixed in advance (package window).
type Decayed struct {
	// HalfLife is the time for a weight to halve. Required.
	HalfLife time.Duration
	// Stat selects count, sum, mean or variance. Default: DecayedCount.
	Stat DecayStat
}

func (k Decayed) spec(h int64) window.DecaySpec {
	return window.DecaySpec{HalfLife: k.HalfLife, Horizon: time.Duration(h)}
}

// Describe implements Kind.
func (k Decayed) Describe() string {
	return fmt.Sprintf("decayed-%v half-life=%d", k.Stat, int64(k.HalfLife))
}

// Validate implements Kind.
func (k Decayed) Validate() error {
	var errs []error
	if int(k.Stat) >= len(decayStatNames) {
		errs = append(errs, fmt.Errorf("unknown DecayStat %d", k.Stat))
	}
	return errors.Join(append(errs, k.spec(0).Validate())...)
}

// Inputs implements Kind.
func (k Decayed) Inputs() Inputs {
	if k.Stat == DecayedCount {
		return 0
	}
	return TakesValue
}

// reach: after 64 half-lives a weight is below 2^-64 of its start.
//
// Reach implements Kind.
func (k Decayed) Reach() time.Duration { return time.Duration(sat.Add(0, 64*int64(k.HalfLife))) }

func (k Decayed) NewAggregate(h time.Duration) Aggregate { return newPlaced(k.placement(h)) }

func (k Decayed) placement(h time.Duration) placement {
	proto := built(window.NewDecayed(k.spec(int64(h))))
	switch k.Stat {
	case DecayedCount:
		return placeAs(func(a *decayedCount) error { a.InitLike(proto); return nil })
	case DecayedSum:
		return placeAs(func(a *decayedSum) error { a.InitLike(proto); return nil })
	case DecayedMean:
		return placeAs(func(a *decayedMean) error { a.InitLike(proto); return nil })
	}
	return placeAs(func(a *decayedVariance) error { a.InitLike(proto); return nil })
}

// One adapter type per statistic rather than a field saying which: a
// field would cost a word of padding in every record.
type (
	decayedCount    struct{ window.Decayed }
	decayedSum      struct{ window.Decayed }
	decayedMean     struct{ window.Decayed }
	decayedVariance struct{ window.Decayed }
)

func (a *decayedCount) Add(t int64, _ float64, _ uint64) bool    { return a.Decayed.Add(t, 1) }
func (a *decayedCount) At(t int64, _ uint64) float64             { return a.CountAt(t) }
func (a *decayedSum) Add(t int64, v float64, _ uint64) bool      { return a.Decayed.Add(t, v) }
func (a *decayedSum) At(t int64, _ uint64) float64               { return a.SumAt(t) }
func (a *decayedMean) Add(t int64, v float64, _ uint64) bool     { return a.Decayed.Add(t, v) }
func (a *decayedMean) At(t int64, _ uint64) float64              { return a.MeanAt(t) }
func (a *decayedVariance) Add(t int64, v float64, _ uint64) bool { return a.Decayed.Add(t, v) }
func (a *decayedVariance) At(t int64, _ uint64) float64          { return a.VarianceAt(t) }

// Velocity is the ratio of an entity's event rate in a Short window to its
// rate in a Long window, with additive smoothing so that a new entity
// reads a finite value (package window states the formula):
//
//	(short + α) / Short  ÷  (long + α·Long/Short) / Long
//
// 1 means the usual pace, large values a burst.
type Velocity struct {
	// Short and Long are the two windows; Short < Long, both multiples
	// of Resolution. Required.
	Short, Long time.Duration
	// Resolution is the pane width. Default: Short/10.
	Resolution time.Duration
	// Smoothing is α. Default: 1.
	Smoothing float64
}

func (k Velocity) spec(h int64) window.VelocitySpec {
	return window.VelocitySpec{Short: k.Short, Long: k.Long, Resolution: cmp.Or(k.Resolution, k.Short/10),
		Horizon: time.Duration(h), Smoothing: cmp.Or(k.Smoothing, 1)} // 1: the window package's default
}

// Describe implements Kind.
func (k Velocity) Describe() string {
	s := k.spec(0)
	return fmt.Sprintf("velocity short=%d long=%d resolution=%d smoothing=%g", s.Short, s.Long, s.Resolution, s.Smoothing)
}

// Validate implements Kind.
func (k Velocity) Validate() error { return k.spec(0).Validate() }

func (Velocity) Inputs() Inputs         { return 0 }
func (k Velocity) Reach() time.Duration { return k.Long }

func (k Velocity) NewAggregate(h time.Duration) Aggregate { return newPlaced(k.placement(h)) }

func (k Velocity) placement(h time.Duration) placement {
	proto := built(window.NewVelocity(k.spec(int64(h))))
	return placeAs(func(a *velocityAgg) error { a.InitLike(proto); return nil })
}

type velocityAgg struct{ window.Velocity }

func (a *velocityAgg) Add(t int64, _ float64, _ uint64) bool { return a.Velocity.Add(t) }
func (a *velocityAgg) At(t int64, _ uint64) float64          { return a.RatioAt(t) }

// RecencyStat selects what a Recency feature reports. Values are frozen.
type RecencyStat uint8

const (
	// SinceLast is the time, in seconds, from the entity's newest event
	// strictly before the asked time to the asked time (NaN if none): the
	// gap before the asking event, which itself is never the "last" one.
	SinceLast RecencyStat = 0
	// Age is the time since the entity was first seen, in seconds (NaN if
	// never).
	Age RecencyStat = 1
	// SessionEvents is the number of events in the entity's current
	// session: events chained by gaps of at most Gap.
	SessionEvents RecencyStat = 2
)

var recencyStatNames = [...]string{"since-last", "age", "session-events"}

func (s RecencyStat) String() string {
	if int(s) < len(recencyStatNames) {
		return recencyStatNames[s]
	}
	return fmt.Sprintf("RecencyStat(%d)", s)
}

// Recency reports when an entity was seen: time since its last event, its
// age, or the events in its current session.
//
// Age and SinceLast have unbounded reach: an entity with one of them never
// expires by default (set Options.TTL to bound state; an expired entity
// then reads as new).
type Recency struct {
	// Stat selects the answer. Default: SinceLast.
	Stat RecencyStat
	// Gap ends a session. Required for SessionEvents; default 30 minutes
	// (common practice for web sessions).
	Gap time.Duration
}

func (k Recency) spec(h int64) window.RecencySpec {
	return window.RecencySpec{Gap: cmp.Or(k.Gap, window.DefaultGap), Horizon: time.Duration(h)}
}

// Describe implements Kind.
func (k Recency) Describe() string {
	return fmt.Sprintf("recency-%v gap=%d", k.Stat, k.spec(0).Gap)
}

// Validate implements Kind.
func (k Recency) Validate() error {
	var errs []error
	if int(k.Stat) >= len(recencyStatNames) {
		errs = append(errs, fmt.Errorf("unknown RecencyStat %d", k.Stat))
	}
	return errors.Join(append(errs, k.spec(0).Validate())...)
}

func (Recency) Inputs() Inputs { return 0 }

// Reach implements Kind.
func (k Recency) Reach() time.Duration {
	if k.Stat == SessionEvents {
		return k.spec(0).Gap
	}
	return 0
}

func (k Recency) NewAggregate(h time.Duration) Aggregate { return newPlaced(k.placement(h)) }

func (k Recency) placement(h time.Duration) placement {
	spec, stat := k.spec(int64(h)), k.Stat
	return placeAs(func(a *recencyAgg) error { a.stat = stat; return a.Init(spec) })
}

// recencyAgg adapts window.Recency to the stat its feature reports.
type recencyAgg struct {
	window.Recency
	stat RecencyStat
}

func (a *recencyAgg) Add(t int64, _ float64, _ uint64) bool { return a.Recency.Add(t) }

func (a *recencyAgg) At(t int64, _ uint64) float64 {
	seconds := func(d int64, ok bool) float64 {
		if !ok {
			return math.NaN()
		}
		return float64(d) / float64(time.Second)
	}
	switch a.stat {
	case SinceLast:
		if t == math.MinInt64 {
			return math.NaN() // nothing is strictly before; t-1 would wrap
		}
		last, ok := a.LastSeenAt(t - 1)
		return seconds(t-last, ok)
	case Age:
		first, ok := a.FirstSeenAt(t)
		return seconds(t-first, ok)
	}
	return float64(a.SessionCountAt(t))
}
