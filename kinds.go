package tallyward

import (
	"cmp"
	"fmt"
	"time"

	"github.com/tallyward/tallyward/window"
)

// Sliding holds the parameters shared by the sliding-window kinds. The
// kinds SlidingCount, SlidingSum, SlidingMin, SlidingMax and SlidingMean
// are defined on it, so each is written SlidingSum{Window: ..., Resolution: ...}.
//
// Windows are kept in epoch-aligned panes of width Resolution. As-of
// answers never include an event newer than the asked time; the trailing
// edge is exact to within one pane (package window states the exact set).
type Sliding struct {
	// Window is the window length. Required; a multiple of Resolution.
	Window time.Duration
	// Resolution is the pane width: finer panes cost memory, coarser panes
	// blur the trailing edge. Default: Window/60.
	Resolution time.Duration
}

func (k Sliding) spec(horizon int64) window.SlidingSpec {
	return window.SlidingSpec{Window: k.Window, Resolution: cmp.Or(k.Resolution, k.Window/60), Horizon: time.Duration(horizon)}
}

func (k Sliding) describe(name string) string {
	s := k.spec(0)
	return fmt.Sprintf("%s window=%d resolution=%d", name, s.Window, s.Resolution)
}

func (k Sliding) validate() error { return k.spec(0).Validate() }

func (k SlidingCount) Reach() time.Duration { return k.Window }
func (k SlidingSum) Reach() time.Duration   { return k.Window }
func (k SlidingMin) Reach() time.Duration   { return k.Window }
func (k SlidingMax) Reach() time.Duration   { return k.Window }
func (k SlidingMean) Reach() time.Duration  { return k.Window }

// SlidingCount counts an entity's events in a sliding window.
type SlidingCount Sliding

// SlidingSum sums a value over a sliding window (0 when empty).
type SlidingSum Sliding

// SlidingMin is the least value in a sliding window (NaN when empty).
type SlidingMin Sliding

// SlidingMax is the greatest value in a sliding window (NaN when empty).
type SlidingMax Sliding

// SlidingMean is the mean value in a sliding window (NaN when empty).
type SlidingMean Sliding

func (k SlidingCount) Describe() string { return Sliding(k).describe("sliding-count") }
func (k SlidingSum) Describe() string   { return Sliding(k).describe("sliding-sum") }
func (k SlidingMin) Describe() string   { return Sliding(k).describe("sliding-min") }
func (k SlidingMax) Describe() string   { return Sliding(k).describe("sliding-max") }
func (k SlidingMean) Describe() string  { return Sliding(k).describe("sliding-mean") }

func (k SlidingCount) Validate() error { return Sliding(k).validate() }
func (k SlidingSum) Validate() error   { return Sliding(k).validate() }
func (k SlidingMin) Validate() error   { return Sliding(k).validate() }
func (k SlidingMax) Validate() error   { return Sliding(k).validate() }
func (k SlidingMean) Validate() error  { return Sliding(k).validate() }

func (SlidingCount) Inputs() Inputs { return 0 }
func (SlidingSum) Inputs() Inputs   { return TakesValue }
func (SlidingMin) Inputs() Inputs   { return TakesValue }
func (SlidingMax) Inputs() Inputs   { return TakesValue }
func (SlidingMean) Inputs() Inputs  { return TakesValue }

// The adapters below embed each window aggregate by value and map the
// pipeline's add/at onto it: one small type per kind rather than
// closures, so a record can hold them inside its one object (see record)
// and an event makes fewer indirect calls.

func (k SlidingCount) NewAggregate(h time.Duration) Aggregate { return newPlaced(k.placement(h)) }
func (k SlidingSum) NewAggregate(h time.Duration) Aggregate   { return newPlaced(k.placement(h)) }
func (k SlidingMin) NewAggregate(h time.Duration) Aggregate   { return newPlaced(k.placement(h)) }
func (k SlidingMax) NewAggregate(h time.Duration) Aggregate   { return newPlaced(k.placement(h)) }
func (k SlidingMean) NewAggregate(h time.Duration) Aggregate  { return newPlaced(k.placement(h)) }

func (k SlidingCount) placement(h time.Duration) placement {
	proto := built(window.NewSlidingCount(Sliding(k).spec(int64(h))))
	return placeAs(func(a *countAgg) error { a.InitLike(proto); return nil })
}

func (k SlidingSum) placement(h time.Duration) placement {
	proto := built(window.NewSlidingSum(Sliding(k).spec(int64(h))))
	return placeAs(func(a *sumAgg) error { a.InitLike(proto); return nil })
}

func (k SlidingMin) placement(h time.Duration) placement {
	proto := built(window.NewSlidingMin(Sliding(k).spec(int64(h))))
	return placeAs(func(a *minAgg) error { a.InitLike(proto); return nil })
}

func (k SlidingMax) placement(h time.Duration) placement {
	proto := built(window.NewSlidingMax(Sliding(k).spec(int64(h))))
	return placeAs(func(a *maxAgg) error { a.InitLike(proto); return nil })
}

func (k SlidingMean) placement(h time.Duration) placement {
	proto := built(window.NewSlidingMean(Sliding(k).spec(int64(h))))
	return placeAs(func(a *meanAgg) error { a.InitLike(proto); return nil })
}

type countAgg struct{ window.SlidingCount }

func (a *countAgg) Add(t int64, _ float64, _ uint64) bool { return a.SlidingCount.Add(t) }
func (a *countAgg) At(t int64, _ uint64) float64          { return float64(a.CountAt(t)) }

type sumAgg struct{ window.SlidingSum }

func (a *sumAgg) Add(t int64, v float64, _ uint64) bool { return a.SlidingSum.Add(t, v) }
func (a *sumAgg) At(t int64, _ uint64) float64          { return a.SumAt(t) }

type minAgg struct{ window.SlidingMin }

func (a *minAgg) Add(t int64, v float64, _ uint64) bool { return a.SlidingMin.Add(t, v) }
func (a *minAgg) At(t int64, _ uint64) float64          { return a.MinAt(t) }

type maxAgg struct{ window.SlidingMax }

func (a *maxAgg) Add(t int64, v float64, _ uint64) bool { return a.SlidingMax.Add(t, v) }
func (a *maxAgg) At(t int64, _ uint64) float64          { return a.MaxAt(t) }

type meanAgg struct{ window.SlidingMean }

func (a *meanAgg) Add(t int64, v float64, _ uint64) bool { return a.SlidingMean.Add(t, v) }
func (a *meanAgg) At(t int64, _ uint64) float64          { return a.MeanAt(t) }

// built returns an aggregate made from a kind's spec. Open validates every
// kind with its horizon before making aggregates, so err is unreachable.
func built[T any](x T, err error) T {
	if err != nil {
		panic(err)
	}
	return x
}

// encoded is what every stored summary of packages window and sketch has.
type encoded interface {
	AppendBinary(dst []byte) ([]byte, error)
	UnmarshalBinary(b []byte) error
	SizeBytes() int
}
