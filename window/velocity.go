package window

import (
	"cmp"
	"math"
	"time"
)

// VelocitySpec defines a velocity ratio: the event rate in a short window
// over the event rate in a long window.
//
// A zero field means its default; Short and Long are required.
type VelocitySpec struct {
	// Short is the short window: > 0, a multiple of Resolution, < Long.
	// Required; no default.
	Short time.Duration
	// Long is the long window, a multiple of Resolution. Required; no
	// default.
	Long time.Duration
	// Resolution is the pane width (see SlidingSpec). Default Short/10 (at
	// least 1 ns).
	Resolution time.Duration
	// Horizon as in SlidingSpec. Default 0.
	Horizon time.Duration
	// Smoothing is α, the pseudo-count added to the short window (and the
	// matching α·Long/Short to the long one); finite, >= 0. 0 means the
	// default, 1.
	Smoothing float64
}

// withDefaults returns s with zero fields set to their defaults.
func (s VelocitySpec) withDefaults() VelocitySpec {
	if s.Short > 0 {
		s.Resolution = cmp.Or(s.Resolution, max(s.Short/10, 1))
	}
	s.Smoothing = cmp.Or(s.Smoothing, 1)
	return s
}

func (s VelocitySpec) sliding() SlidingSpec {
	return SlidingSpec{Window: s.Long, Resolution: s.Resolution, Horizon: s.Horizon}
}

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil. Zero fields mean their defaults.
func (s VelocitySpec) Validate() error {
	s = s.withDefaults()
	e := newSpecErrs("VelocitySpec")
	e.positive("Short", s.Short)
	e.check(s.Short < s.Long, "Short", "must be < Long")
	e.check(s.Resolution <= 0 || s.Short%s.Resolution == 0, "Short", "must be a multiple of Resolution")
	e.positive("Long", s.Long)
	e.check(s.Resolution <= 0 || s.Long%s.Resolution == 0, "Long", "must be a multiple of Resolution")
	e.check(s.Short <= 0 || s.Resolution > 0, "Resolution", "must be > 0")
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
// Build with NewVelocity; the zero value ignores Add and answers NaN. Not
// safe for concurrent use.
type Velocity struct {
	ring // its shape holds the velocity spec and the short window
}

// NewVelocity returns an empty velocity ratio over spec, or the errors of
// spec.Validate.
func NewVelocity(spec VelocitySpec) (*Velocity, error) {
	v := new(Velocity)
	if err := v.Init(spec); err != nil {
		return nil, err
	}
	return v, nil
}

// Init makes v an empty ratio over spec in place, whatever v held, or
// returns the errors of spec.Validate (v is then unusable, like the zero
// value). It allocates only its immutable parameters (InitLike shares
// them); v must not be copied afterwards.
func (v *Velocity) Init(spec VelocitySpec) error {
	*v = Velocity{}
	if err := spec.Validate(); err != nil {
		return err
	}
	spec = spec.withDefaults()
	sh, err := newRingShape(spec.sliding(), opCount, kindVelocity)
	if err != nil {
		return err
	}
	sh.vspec, sh.short = spec, int64(spec.Short/spec.Resolution)
	v.initLike(sh)
	return nil
}

// InitLike makes v an empty ratio with the spec proto was built with,
// sharing proto's immutable parameters: no validation, no allocation. v
// must not be copied afterwards.
func (v *Velocity) InitLike(proto *Velocity) { v.initLike(proto.sh) }

// Spec returns the spec the aggregate was built with, defaults applied.
func (v *Velocity) Spec() VelocitySpec {
	if v.sh == nil {
		return VelocitySpec{}
	}
	return v.sh.vspec
}

// Add records one event at time t; see SlidingCount.Add.
func (v *Velocity) Add(t int64) bool { return v.add(t, 0) }

// CountsAt returns the short and long window counts as of t.
func (v *Velocity) CountsAt(t int64) (short, long uint64) {
	if v.sh == nil {
		return 0, 0
	}
	short, _ = v.query(t, v.sh.short)
	long, _ = v.query(t, v.sh.n)
	return short, long
}

// RatioAt returns the smoothed velocity ratio as of t (formula on the type).
func (v *Velocity) RatioAt(t int64) float64 {
	if v.sh == nil {
		return math.NaN()
	}
	cs, cl := v.CountsAt(t)
	vs := &v.sh.vspec
	a := vs.Smoothing
	return (float64(cs) + a) / (float64(cl)*float64(vs.Short)/float64(vs.Long) + a)
}
