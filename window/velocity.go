package window

import "math"

// VelocitySpec defines a velocity ratio: the event rate in a short window
// over the event rate in a long window.
type VelocitySpec struct {
	// Short is the short window in nanoseconds: > 0, a multiple of
	// Resolution, < Long. No default.
	Short int64
	// Long is the long window in nanoseconds, a multiple of Resolution. No
	// default.
	Long int64
	// Resolution is the pane width in nanoseconds (see SlidingSpec). No
	// default.
	Resolution int64
	// Horizon as in SlidingSpec. Default 0.
	Horizon int64
	// Smoothing is α, the pseudo-count added to the short window (and the
	// matching α·Long/Short to the long one); finite, >= 0. 0 means the
	// default, 1.
	Smoothing float64
}

func (s VelocitySpec) alpha() float64 {
	if s.Smoothing == 0 {
		return 1
	}
	return s.Smoothing
}

func (s VelocitySpec) sliding() SlidingSpec {
	return SlidingSpec{Window: s.Long, Resolution: s.Resolution, Horizon: s.Horizon}
}

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil.
func (s VelocitySpec) Validate() error {
	e := specErrs{spec: "VelocitySpec"}
	e.positive("Short", s.Short)
	e.check(s.Short < s.Long, "Short", "must be < Long")
	e.check(s.Resolution <= 0 || s.Short%s.Resolution == 0, "Short", "must be a multiple of Resolution")
	e.positive("Long", s.Long)
	e.check(s.Resolution <= 0 || s.Long%s.Resolution == 0, "Long", "must be a multiple of Resolution")
	e.positive("Resolution", s.Resolution)
	e.nonNegative("Horizon", s.Horizon)
	e.check(finite(s.Smoothing) && s.Smoothing >= 0, "Smoothing", "must be finite and >= 0")
	return e.err()
}

// Velocity compares the recent event rate of an entity with its longer-term
// rate. With cS and cL the counts of the short and long windows as of t
// (each with the SlidingCount semantics, trailing-edge error included; the
// long window includes the short one), S = Short, L = Long and α =
// Smoothing:
//
//	RatioAt(t) = ((cS + α) / S) / ((cL + α·L/S) / L)
//	           = (cS + α) / (cL·S/L + α)
//
// that is, α/S pseudo-rate is added to both rates. A new entity (no events)
// gets exactly 1; an entity whose every event falls in the short window gets
// (c + α)/(c·S/L + α), which tends to L/S as c grows; a steady rate gives
// about 1; a burst gives more than 1, a lull less.
//
// One pane ring (Window = Long) holds the events; Horizon, Add and
// encoding behave as for SlidingCount (kind byte 7).
//
// Build with NewVelocity; an aggregate built from an invalid spec ignores
// Add and answers NaN. Not safe for concurrent use.
type Velocity struct {
	ring
	vspec VelocitySpec
	short int64 // panes in Short
}

// NewVelocity returns an empty velocity ratio over spec.
func NewVelocity(spec VelocitySpec) *Velocity {
	v := &Velocity{vspec: spec}
	v.init(spec.sliding(), opCount, kindVelocity)
	if spec.Validate() != nil {
		v.valid = false
		return v
	}
	v.short = spec.Short / spec.Resolution
	return v
}

// Spec returns the spec the aggregate was built with.
func (v *Velocity) Spec() VelocitySpec { return v.vspec }

// Add records one event at time t; see SlidingCount.Add.
func (v *Velocity) Add(t int64) bool { return v.add(t, 0) }

// CountsAt returns the short and long window counts as of t.
func (v *Velocity) CountsAt(t int64) (short, long uint64) {
	short, _ = v.query(t, v.short)
	long, _ = v.query(t, v.n)
	return short, long
}

// RatioAt returns the smoothed velocity ratio as of t (formula on the type).
func (v *Velocity) RatioAt(t int64) float64 {
	if !v.valid {
		return math.NaN()
	}
	cs, cl := v.CountsAt(t)
	a := v.vspec.alpha()
	return (float64(cs) + a) / (float64(cl)*float64(v.vspec.Short)/float64(v.vspec.Long) + a)
}
