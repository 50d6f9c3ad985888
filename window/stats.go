package window

import "math"

// valued is a ring whose events carry a value; its Add is promoted to the
// sliding sum, min, max and mean.
type valued struct{ ring }

// Add records one event at time t with value v. It returns false, changing
// nothing, when v is NaN or ±Inf or when pane(t) is older than the floor
// (see SlidingCount).
func (g *valued) Add(t int64, v float64) bool { return g.add(t, v) }

// SlidingSum sums event values over a sliding window. Which events are
// aggregated as of t, the trailing-edge error, the Horizon and the
// behaviour for queries older than the exact horizon are those of
// SlidingCount.
//
// Float addition is not associative (Goldberg, "What every computer
// scientist should know about floating-point arithmetic", ACM Computing
// Surveys 23(1), 1991): values are added in time order (ties in arrival
// order) into each pane and raw buffer, so bit-identical results across runs
// need the same apply order, which the pipeline supplies.
//
// Build with NewSlidingSum. Not safe for concurrent use.
type SlidingSum struct{ valued }

// SlidingMin tracks the least value over a sliding window, with the
// semantics of SlidingCount.
//
// Build with NewSlidingMin. Not safe for concurrent use.
type SlidingMin struct{ valued }

// SlidingMax tracks the greatest value over a sliding window, with the
// semantics of SlidingCount.
//
// Build with NewSlidingMax. Not safe for concurrent use.
type SlidingMax struct{ valued }

// SlidingMean averages event values over a sliding window: the SlidingSum
// divided by the SlidingCount of the same events (same ordering caveat as
// SlidingSum).
//
// Build with NewSlidingMean. Not safe for concurrent use.
type SlidingMean struct{ valued }

// newValued builds one of the value aggregates: *T embeds valued.
func newValued[T any](spec SlidingSpec, o op, kind byte, inner func(*T) *valued) (*T, error) {
	x := new(T)
	if err := inner(x).init(spec, o, kind); err != nil {
		return nil, err
	}
	return x, nil
}

// Init makes s an empty sum over spec in place; see SlidingCount.Init.
func (s *SlidingSum) Init(spec SlidingSpec) error { return s.init(spec, opSum, kindSlidingSum) }

// Init makes s an empty minimum over spec in place; see SlidingCount.Init.
func (s *SlidingMin) Init(spec SlidingSpec) error { return s.init(spec, opMin, kindSlidingMin) }

// Init makes s an empty maximum over spec in place; see SlidingCount.Init.
func (s *SlidingMax) Init(spec SlidingSpec) error { return s.init(spec, opMax, kindSlidingMax) }

// Init makes s an empty mean over spec in place; see SlidingCount.Init.
func (s *SlidingMean) Init(spec SlidingSpec) error { return s.init(spec, opSum, kindSlidingMean) }

// InitLike makes s an empty aggregate like proto; see SlidingCount.InitLike.
func (s *SlidingSum) InitLike(proto *SlidingSum) { s.initLike(proto.sh) }

// NewSlidingSum returns an empty sum over spec, or the errors of
// spec.Validate.
func NewSlidingSum(spec SlidingSpec) (*SlidingSum, error) {
	return newValued(spec, opSum, kindSlidingSum, func(s *SlidingSum) *valued { return &s.valued })
}

// InitLike makes s an empty aggregate like proto; see SlidingCount.InitLike.
func (s *SlidingMin) InitLike(proto *SlidingMin) { s.initLike(proto.sh) }

// NewSlidingMin returns an empty minimum over spec, or the errors of
// spec.Validate.
func NewSlidingMin(spec SlidingSpec) (*SlidingMin, error) {
	return newValued(spec, opMin, kindSlidingMin, func(s *SlidingMin) *valued { return &s.valued })
}

// InitLike makes s an empty aggregate like proto; see SlidingCount.InitLike.
func (s *SlidingMax) InitLike(proto *SlidingMax) { s.initLike(proto.sh) }

// NewSlidingMax returns an empty maximum over spec, or the errors of
// spec.Validate.
func NewSlidingMax(spec SlidingSpec) (*SlidingMax, error) {
	return newValued(spec, opMax, kindSlidingMax, func(s *SlidingMax) *valued { return &s.valued })
}

// InitLike makes s an empty aggregate like proto; see SlidingCount.InitLike.
func (s *SlidingMean) InitLike(proto *SlidingMean) { s.initLike(proto.sh) }

// NewSlidingMean returns an empty mean over spec, or the errors of
// spec.Validate.
func NewSlidingMean(spec SlidingSpec) (*SlidingMean, error) {
	return newValued(spec, opSum, kindSlidingMean, func(s *SlidingMean) *valued { return &s.valued })
}

// SumAt returns the sum of the values in the window as of t, 0 if empty.
func (s *SlidingSum) SumAt(t int64) float64 {
	n, v := s.queryAll(t)
	return orEmpty(n, v, 0)
}

// MinAt returns the least value in the window as of t, NaN if empty.
func (s *SlidingMin) MinAt(t int64) float64 {
	n, v := s.queryAll(t)
	return orEmpty(n, v, math.NaN())
}

// MaxAt returns the greatest value in the window as of t, NaN if empty.
func (s *SlidingMax) MaxAt(t int64) float64 {
	n, v := s.queryAll(t)
	return orEmpty(n, v, math.NaN())
}

// MeanAt returns the mean of the values in the window as of t, NaN if
// empty.
func (s *SlidingMean) MeanAt(t int64) float64 {
	n, v := s.queryAll(t)
	return orEmpty(n, v/float64(n), math.NaN())
}

// CountAt returns the number of events the mean as of t averages.
func (s *SlidingMean) CountAt(t int64) uint64 {
	n, _ := s.queryAll(t)
	return n
}

func orEmpty(n uint64, v, empty float64) float64 {
	if n == 0 {
		return empty
	}
	return v
}
