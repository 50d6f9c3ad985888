package window

import (
	"cmp"
	"fmt"
	"math"
	"time"
	"unsafe"

	"github.com/tallyward/tallyward/internal/wire"
)

// SurgeSpec defines a velocity against a decayed baseline: the event rate
// in a short window over the entity's long-run, exponentially decayed
// rate. A zero field means its default; Window and HalfLife are required.
type SurgeSpec struct {
	// Window is the short window, > 0 and a multiple of Resolution.
	// Required; no default.
	Window time.Duration
	// HalfLife of the baseline, > 0: an event's weight in the long-run rate
	// halves every HalfLife. Usually many times Window (a day against an
	// hour, say). Required; no default.
	HalfLife time.Duration
	// Resolution is the pane width of the short window (see SlidingSpec).
	// Default Window/10 (at least 1 ns).
	Resolution time.Duration
	// Horizon as in SlidingSpec. Default 0.
	Horizon time.Duration
	// Smoothing is α, a pseudo-count added to the short window and, at the
	// same rate, to the baseline; finite, > 0 after defaults. Default 1.
	Smoothing float64
}

func (s SurgeSpec) withDefaults() SurgeSpec {
	if s.Window > 0 {
		s.Resolution = cmp.Or(s.Resolution, max(s.Window/10, 1))
	}
	s.Smoothing = cmp.Or(s.Smoothing, 1)
	return s
}

func (s SurgeSpec) sliding() SlidingSpec {
	return SlidingSpec{Window: s.Window, Resolution: s.Resolution, Horizon: s.Horizon}
}

func (s SurgeSpec) decay() DecaySpec { return DecaySpec{HalfLife: s.HalfLife, Horizon: s.Horizon} }

// Validate reports every problem of s at once (errors.Join of *SpecError,
// each matching ErrInvalidSpec), or nil. Zero fields mean their defaults.
func (s SurgeSpec) Validate() error {
	s = s.withDefaults()
	e := newSpecErrs("SurgeSpec")
	e.positive("Window", s.Window)
	e.positive("HalfLife", s.HalfLife)
	e.check(s.Window <= 0 || s.Resolution > 0, "Resolution", "must be > 0")
	e.check(s.Window <= 0 || s.Resolution <= 0 || s.Window%s.Resolution == 0,
		"Window", "must be a multiple of Resolution")
	e.nonNegative("Horizon", s.Horizon)
	e.check(finite(s.Smoothing) && s.Smoothing > 0, "Smoothing", "must be finite and > 0")
	e.check(s.HalfLife <= 0 || int64(s.HalfLife) <= math.MaxInt64/defaultRebaseEvery,
		"HalfLife", "times 32 overflows int64")
	return e.err()
}

// Surge compares an entity's recent event rate with its own long-run rate.
// With c the count of the short window as of t (SlidingCount semantics,
// trailing-edge error included), D the decayed count as of t (Decayed:
// D = Σ 2^(−(t−ti)/h) over the events at or before t, the short window's
// included), W = Window, h = HalfLife and α = Smoothing:
//
//	short rate     c / W
//	baseline rate  D · ln2 / h     (a steady rate r gives D → r·h/ln2)
//	RatioAt(t) = ((c + α) / W) / ((D + α·h/(W·ln2)) · ln2/h)
//	           = (c + α) / (D · W·ln2/h + α)
//
// that is, the pseudo-rate α/W is added to both rates. A new entity (no
// events) reads exactly 1; a steady rate reads about 1 (once the history
// is several half-lives long); a burst reads more than 1, a lull less. An
// entity whose every event falls in the short window reads
// (c + α)/(c·W·ln2/h + α), which tends to h/(W·ln2) as c grows.
//
// Storage and exactness are those of SlidingCount (Window, Resolution,
// Horizon) and Decayed (HalfLife, Horizon): queries at t >= Newest() −
// Horizon are exact; older ones answer NaN, as Decayed does, rather than a
// value that could include a newer event.
//
// Cost: an Add and a query of a SlidingCount and of a Decayed; memory
// and encoding, the two together (BenchmarkAdd/Surge and
// BenchmarkQuery/Surge.RatioAt measure it beside Velocity).
//
// Build with NewSurge; the zero value ignores Add and answers NaN. Not
// safe for concurrent use.
type Surge struct {
	spec  SurgeSpec // defaults applied
	short SlidingCount
	base  *Decayed
	k     float64 // W·ln2/h
}

// NewSurge returns an empty surge ratio over spec, or the errors of
// spec.Validate.
func NewSurge(spec SurgeSpec) (*Surge, error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	spec = spec.withDefaults()
	s := &Surge{spec: spec, k: float64(spec.Window) * math.Ln2 / float64(spec.HalfLife)}
	if err := s.short.init(spec.sliding(), opCount, kindSlidingCount); err != nil {
		return nil, err
	}
	var err error
	if s.base, err = NewDecayed(spec.decay()); err != nil {
		return nil, err
	}
	return s, nil
}

// Spec returns the spec the aggregate was built with, defaults applied.
func (s *Surge) Spec() SurgeSpec { return s.spec }

// Reset empties the aggregate and keeps its spec and storage.
func (s *Surge) Reset() {
	if s.base != nil {
		s.short.Reset()
		s.base.Reset()
	}
}

// Newest returns the largest time added, and false if none was.
func (s *Surge) Newest() (int64, bool) { return s.short.Newest() }

// Count returns the number of events the short window retains.
func (s *Surge) Count() uint64 { return s.short.Count() }

// SizeBytes returns the approximate heap footprint in bytes.
func (s *Surge) SizeBytes() int {
	n := int(unsafe.Sizeof(*s)) + s.short.SizeBytes()
	if s.base != nil {
		n += s.base.SizeBytes()
	}
	return n
}

// Add records one event at time t. It returns false, changing nothing,
// when the short window refuses t (its pane is older than the floor; see
// SlidingCount).
func (s *Surge) Add(t int64) bool {
	if s.base == nil || !s.short.Add(t) {
		return false
	}
	return s.base.Add(t, 1)
}

// CountsAt returns the short window's count and the decayed count as of
// t (NaN baseline for t < Newest() − Horizon).
func (s *Surge) CountsAt(t int64) (short uint64, baseline float64) {
	if s.base == nil {
		return 0, math.NaN()
	}
	return s.short.CountAt(t), s.base.CountAt(t)
}

// RatioAt returns the surge ratio as of t (formula on the type); NaN for
// t < Newest() − Horizon and for the zero value.
func (s *Surge) RatioAt(t int64) float64 {
	c, d := s.CountsAt(t)
	if math.IsNaN(d) {
		return math.NaN()
	}
	a := s.spec.Smoothing
	return (float64(c) + a) / (d*s.k + a)
}

// AppendBinary appends the encoding of the state (not the spec) to dst;
// the layout is given on UnmarshalBinary.
func (s *Surge) AppendBinary(dst []byte) ([]byte, error) {
	if s.base == nil {
		return dst, errInvalidAgg
	}
	dst, err := wire.AppendFramed(append(dst, version1, kindSurge, 0), s.short.AppendBinary)
	if err != nil {
		return dst, err
	}
	return s.base.AppendBinary(dst)
}

// UnmarshalBinary replaces the state with the decoded one. The receiver
// must have been built with the spec the state was encoded under (the
// spec is not stored). On error the receiver is unchanged.
//
// Layout, version 1:
//
//	byte     version = 1 (else ErrUnknownVersion)
//	byte     kind = 9 (else ErrWrongKind)
//	byte     flags: zero
//	uvarint  n, then n bytes: the short window, in the sliding count
//	         layout (kind 1; see SlidingCount.UnmarshalBinary)
//	rest     the baseline, in the decayed layout (kind 6; see
//	         Decayed.UnmarshalBinary)
//
// The two parts must agree on whether any event was added and on the
// newest time (else ErrCorrupt).
func (s *Surge) UnmarshalBinary(b []byte) error {
	if s.base == nil {
		return errInvalidAgg
	}
	d := wire.Decoder{B: b}
	header(&d, kindSurge, 0)
	part := d.Bytes(d.Len())
	if d.Err != nil {
		return fmt.Errorf("window: decode surge: %w", d.Err)
	}
	var short SlidingCount
	if err := short.init(s.spec.sliding(), opCount, kindSlidingCount); err != nil {
		return err
	}
	if err := short.UnmarshalBinary(part); err != nil {
		return err
	}
	base, err := NewDecayed(s.spec.decay())
	if err != nil {
		return err
	}
	if err := base.UnmarshalBinary(d.B); err != nil {
		return err
	}
	t1, ok1 := short.Newest()
	t2, ok2 := base.Newest()
	if t1 != t2 || ok1 != ok2 {
		return fmt.Errorf("window: decode surge: %w: short window and baseline disagree on the newest time", ErrCorrupt)
	}
	s.short, s.base = short, base
	return nil
}
