package tallyward

import (
	"cmp"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
	"github.com/tallyward/tallyward/sketch"
)

// Distinct counts the distinct items (Feature.Item) an entity saw in a
// sliding window: distinct accounts per device in 24 hours, say. Exact
// while at most ExactLimit items are in the window, then a sliding
// HyperLogLog with relative standard error 1.04/√2^Precision (package
// sketch).
//
// Limit: the window and the pipeline's allowed disorder together span at
// most 512 panes: Window/Resolution + ⌈(MaxDisorder+1ns)/Resolution⌉ + 1
// ≤ 512. Validate checks the window alone; Open checks it with
// MaxDisorder and names the feature. A large MaxDisorder (Settled mode
// over a slow source, say) needs a coarser Resolution.
type Distinct struct {
	// Window is the window length. Required; a multiple of Resolution.
	Window time.Duration
	// Resolution is the pane width. Default: Window/60.
	Resolution time.Duration
	// Precision is the HyperLogLog precision p (4..18). Default: 12.
	Precision uint8
	// ExactLimit is how many distinct items are kept exactly (with their
	// times) before the count switches to HyperLogLog registers for good;
	// each costs about 16 bytes per entity. 1..4096. Default: 128.
	ExactLimit int
}

func (k Distinct) spec(h int64) sketch.DistinctSpec {
	return sketch.DistinctSpec{Window: k.Window, Resolution: cmp.Or(k.Resolution, k.Window/60),
		Horizon: time.Duration(h), Precision: cmp.Or(k.Precision, 12), ExactLimit: cmp.Or(k.ExactLimit, 128)} // the sketch package's defaults
}

// Describe implements Kind. The exact limit appears only when it is not
// the default, so stores made before it was settable keep their
// definitions.
func (k Distinct) Describe() string {
	s := k.spec(0)
	d := fmt.Sprintf("distinct window=%d resolution=%d precision=%d", s.Window, s.Resolution, s.Precision)
	if s.ExactLimit != 128 {
		d += fmt.Sprintf(" exact-limit=%d", s.ExactLimit)
	}
	return d
}

// Validate implements Kind.
func (k Distinct) Validate() error                        { return k.spec(0).Validate() }
func (Distinct) Inputs() Inputs                           { return TakesItem }
func (k Distinct) Reach() time.Duration                   { return k.Window }
func (k Distinct) NewAggregate(h time.Duration) Aggregate { return newPlaced(k.placement(h)) }

func (k Distinct) placement(h time.Duration) placement {
	proto, err := sketch.NewDistinct(k.spec(int64(h)))
	if err != nil {
		panic(err) // unreachable: Open validates every kind with its horizon first
	}
	return placeAs(func(a *distinctAgg) error { a.InitLike(proto); return nil })
}

// validateWith checks the spec with the pipeline's horizon, which counts
// against the pane limit.
func (k Distinct) CheckHorizon(horizon time.Duration) error { return k.spec(int64(horizon)).Validate() }

type distinctAgg struct{ sketch.Distinct }

func (a *distinctAgg) Add(t int64, _ float64, h uint64) bool { return a.Distinct.Add(t, h) }
func (a *distinctAgg) At(t int64, _ uint64) float64          { return float64(a.DistinctAt(t)) }

// Frequency estimates how many of an entity's events carried the asking
// event's item (a card seen at this merchant, say), over the entity's
// lifetime, with a Count-Min sketch: never an underestimate, and at most
// Epsilon·N over with probability 1−Delta. Memory is about
// 8·⌈e/Epsilon⌉·⌈ln(1/Delta)⌉ bytes per entity.
type Frequency struct {
	// Epsilon is the overestimate bound as a share of the entity's events.
	// Default: 0.01.
	Epsilon float64
	// Delta is the probability that the bound fails. Default: 0.01.
	Delta float64
}

func (k Frequency) params() sketch.CountMinParams {
	return sketch.CountMinParams{Epsilon: cmp.Or(k.Epsilon, 0.01), Delta: cmp.Or(k.Delta, 0.01)}
}

// Describe implements Kind.
func (k Frequency) Describe() string {
	p := k.params()
	return fmt.Sprintf("frequency epsilon=%g delta=%g", p.Epsilon, p.Delta)
}

// Validate implements Kind.
func (k Frequency) Validate() error    { return k.params().Validate() }
func (Frequency) Inputs() Inputs       { return TakesItem }
func (Frequency) Reach() time.Duration { return 0 }
func (k Frequency) NewAggregate(horizon time.Duration) Aggregate {
	cm, err := sketch.NewCountMin(k.params())
	if err != nil {
		panic(err) // Validate ran first
	}
	return newTailed(int64(horizon), &frequencySummary{cm})
}

// TopShare is the share of an entity's events that carried its most
// frequent item (the top merchant's share of a card's payments, say),
// over its lifetime, by Space-Saving with Capacity counters: the top
// item's count is overestimated by at most N/Capacity.
type TopShare struct {
	// Capacity is the number of counters. Default: 32.
	Capacity int
}

func (k TopShare) params() sketch.TopKParams {
	return sketch.TopKParams{Capacity: cmp.Or(k.Capacity, 32)} // 32: the sketch package's default
}

// Describe implements Kind.
func (k TopShare) Describe() string {
	return fmt.Sprintf("top-share capacity=%d", k.params().Capacity)
}

// Validate implements Kind.
func (k TopShare) Validate() error    { return k.params().Validate() }
func (TopShare) Inputs() Inputs       { return TakesItem }
func (TopShare) Reach() time.Duration { return 0 }
func (k TopShare) NewAggregate(horizon time.Duration) Aggregate {
	tk, err := sketch.NewTopK(k.params())
	if err != nil {
		panic(err) // Validate ran first
	}
	return newTailed(int64(horizon), &topShareSummary{tk: tk})
}

// Quantile is the Q-quantile of an entity's values over its lifetime (is
// this amount above the card's 95th percentile, say), with relative error
// at most RelativeAccuracy (package sketch). NaN while empty.
type Quantile struct {
	// Q in [0, 1]. Required.
	Q float64
	// RelativeAccuracy α. Default: 0.01.
	RelativeAccuracy float64
}

func (k Quantile) params() sketch.QuantileParams {
	return sketch.QuantileParams{RelativeAccuracy: cmp.Or(k.RelativeAccuracy, 0.01)}
}

// Describe implements Kind.
func (k Quantile) Describe() string {
	return fmt.Sprintf("quantile q=%g alpha=%g", k.Q, k.params().RelativeAccuracy)
}

// Validate implements Kind.
func (k Quantile) Validate() error {
	var errs []error
	if !(k.Q >= 0 && k.Q <= 1) {
		errs = append(errs, fmt.Errorf("quantile Q %v must be in [0, 1]", k.Q))
	}
	return errors.Join(append(errs, k.params().Validate())...)
}
func (Quantile) Inputs() Inputs       { return TakesValue }
func (Quantile) Reach() time.Duration { return 0 }
func (k Quantile) NewAggregate(horizon time.Duration) Aggregate {
	q, err := sketch.NewQuantile(k.params())
	if err != nil {
		panic(err) // Validate ran first
	}
	return newTailed(int64(horizon), &quantileSummary{q: q, quantile: k.Q})
}

// summary is a time-free sketch that a tailedSummary wraps.
type summary interface {
	encoded
	fold(v float64, h uint64)
	// answer reports the summary plus the extra events (all as of the
	// asked time), for the asking event's item.
	answer(extra []tailEvent, item uint64) float64
}

type tailEvent struct {
	t int64
	v float64
	h uint64
}

// tailedSummary gives a time-free summary exact as-of answers: events within
// horizon of the newest time are kept raw, in time order, and folded into
// the summary once older. An answer as of t >= newest − horizon is the
// summary (all of whose events are at or before that) plus the raw events
// at or before t, so it never counts an event newer than t. As of an
// older t (only late events under ApplyLate ask that), the answer also
// includes the summary's events between t and newest − horizon.
//
// Invariant: raw is sorted by t and every raw t > newest − horizon.
type tailedSummary struct {
	sum     summary
	raw     []tailEvent
	newest  int64
	has     bool
	horizon int64
}

func newTailed(horizon int64, s summary) *tailedSummary {
	return &tailedSummary{sum: s, horizon: horizon}
}

func (l *tailedSummary) Add(t int64, v float64, h uint64) bool {
	if !l.has || t > l.newest {
		l.newest, l.has = t, true
		cut := sat.Sub(l.newest, l.horizon)
		i := 0
		for i < len(l.raw) && l.raw[i].t <= cut {
			l.sum.fold(l.raw[i].v, l.raw[i].h)
			i++
		}
		l.raw = append(l.raw[:0], l.raw[i:]...)
	}
	if t <= sat.Sub(l.newest, l.horizon) {
		l.sum.fold(v, h)
		return true
	}
	i, _ := slices.BinarySearchFunc(l.raw, t, func(e tailEvent, t int64) int {
		if e.t <= t {
			return -1 // after equal times: ties keep apply order
		}
		return 1
	})
	l.raw = slices.Insert(l.raw, i, tailEvent{t, v, h})
	return true
}

func (l *tailedSummary) At(t int64, item uint64) float64 {
	n, _ := slices.BinarySearchFunc(l.raw, t, func(e tailEvent, t int64) int {
		if e.t <= t {
			return -1
		}
		return 1
	})
	return l.sum.answer(l.raw[:n], item)
}

// Newest implements Aggregate.
func (l *tailedSummary) Newest() (t int64, ok bool) { return l.newest, l.has }

func (l *tailedSummary) SizeBytes() int { return 64 + 24*cap(l.raw) + l.sum.SizeBytes() }

const tailedVersion1 = 1

// AppendBinary encodes l:
//
//	byte     version (1)
//	byte     1 if any event was added, else 0
//	varint   newest time
//	uvarint  number of raw events n
//	n times: uvarint newest − t, 8 bytes value (IEEE 754, little endian),
//	         8 bytes item hash (little endian)
//	rest     the summary's own versioned encoding (package sketch)
func (l *tailedSummary) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, tailedVersion1)
	if l.has {
		dst = append(dst, 1)
	} else {
		dst = append(dst, 0)
	}
	dst = binary.AppendVarint(dst, l.newest)
	dst = binary.AppendUvarint(dst, uint64(len(l.raw)))
	for _, e := range l.raw {
		dst = binary.AppendUvarint(dst, uint64(l.newest-e.t))
		dst = binary.LittleEndian.AppendUint64(dst, math.Float64bits(e.v))
		dst = binary.LittleEndian.AppendUint64(dst, e.h)
	}
	return l.sum.AppendBinary(dst)
}

var errTailed = errors.New("tailed summary")

// UnmarshalBinary decodes the format of AppendBinary; l is unchanged on
// error. Layout, version 1 (docs/formats.md lists every layout):
//
//	byte     version (1)
//	byte     1 if any event was added, else 0
//	varint   newest time
//	uvarint  number of raw events n, then n times, oldest first:
//	         uvarint newest − t, 8 bytes value (IEEE 754, little endian),
//	         8 bytes item hash (little endian)
//	rest     the summary's own versioned encoding (package sketch)
func (l *tailedSummary) UnmarshalBinary(b []byte) error {
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != tailedVersion1 {
		return fmt.Errorf("%w: unknown version %d", errTailed, v)
	}
	has := d.Byte()
	newest := d.Varint()
	n := d.Uvarint()
	if d.Err == nil && (has > 1 || n > uint64(len(d.B))/17) {
		return fmt.Errorf("%w: bad header", errTailed)
	}
	raw := make([]tailEvent, 0, n)
	for range n {
		back := d.Uvarint()
		bits := d.Bytes(16)
		if d.Err != nil {
			break
		}
		t := newest - int64(back)
		if back > math.MaxInt64 || t > newest || (len(raw) > 0 && t < raw[len(raw)-1].t) {
			return fmt.Errorf("%w: raw events out of order", errTailed)
		}
		raw = append(raw, tailEvent{t, math.Float64frombits(binary.LittleEndian.Uint64(bits)), binary.LittleEndian.Uint64(bits[8:])})
	}
	if d.Err != nil {
		return fmt.Errorf("%w: %w", errTailed, d.Err)
	}
	if err := l.sum.UnmarshalBinary(d.B); err != nil {
		return fmt.Errorf("%w: %w", errTailed, err)
	}
	l.raw, l.newest, l.has = raw, newest, has == 1
	return nil
}

type frequencySummary struct{ *sketch.CountMin }

// UnmarshalBinary also checks the stored parameters against the
// definition's: the definition check on Open covers the kind, this covers
// a record written under other parameters.
// The parameters are read first, so a blob naming others is refused
// before its cells are allocated.
func (s *frequencySummary) UnmarshalBinary(b []byte) error {
	want := s.Params()
	got, err := sketch.CountMinParamsOf(b)
	if err != nil {
		return err
	}
	if got != want {
		return fmt.Errorf("%w: count-min parameters %+v, definition has %+v", errTailed, got, want)
	}
	var cm sketch.CountMin
	if err := cm.UnmarshalBinary(b); err != nil {
		return err
	}
	*s.CountMin = cm
	return nil
}

func (s *frequencySummary) fold(_ float64, h uint64) { s.Add(h, 1) }
func (s *frequencySummary) answer(extra []tailEvent, item uint64) float64 {
	n := s.Estimate(item)
	for _, e := range extra {
		if e.h == item {
			n++
		}
	}
	return float64(n)
}

type topShareSummary struct {
	tk  *sketch.TopK
	top []sketch.Counter
}

func (s *topShareSummary) AppendBinary(dst []byte) ([]byte, error) { return s.tk.AppendBinary(dst) }
func (s *topShareSummary) UnmarshalBinary(b []byte) error          { return s.tk.UnmarshalBinary(b) }
func (s *topShareSummary) SizeBytes() int                          { return s.tk.SizeBytes() }
func (s *topShareSummary) fold(_ float64, h uint64)                { s.tk.Add(h, 1) }

// answer: the largest (summary count + raw count) over the summary's top
// item and the raw items, over the total. Raw events are few (within the
// horizon), so this is cheap.
func (s *topShareSummary) answer(extra []tailEvent, _ uint64) float64 {
	total := s.tk.Count() + uint64(len(extra))
	if total == 0 {
		return math.NaN()
	}
	s.top = s.tk.Top(s.top[:0], 1)
	count := func(h uint64) uint64 {
		var n uint64
		if c, ok := s.tk.Estimate(h); ok {
			n = c.Count
		}
		for _, e := range extra {
			if e.h == h {
				n++
			}
		}
		return n
	}
	var best uint64
	if len(s.top) > 0 {
		best = count(s.top[0].Hash)
	}
	for _, e := range extra {
		best = max(best, count(e.h))
	}
	return float64(best) / float64(total)
}

type quantileSummary struct {
	q        *sketch.Quantile
	quantile float64
	scratch  *sketch.Quantile // summary + raw events, built per answer when raw is not empty
}

func (s *quantileSummary) AppendBinary(dst []byte) ([]byte, error) { return s.q.AppendBinary(dst) }
func (s *quantileSummary) UnmarshalBinary(b []byte) error          { return s.q.UnmarshalBinary(b) }
func (s *quantileSummary) SizeBytes() int                          { return s.q.SizeBytes() }
func (s *quantileSummary) fold(v float64, _ uint64)                { s.q.Add(v) }
func (s *quantileSummary) answer(extra []tailEvent, _ uint64) float64 {
	src := s.q
	if len(extra) > 0 {
		if s.scratch == nil {
			s.scratch, _ = sketch.NewQuantile(s.q.Params())
		}
		s.scratch.Reset()
		if err := s.scratch.Merge(s.q); err != nil {
			return math.NaN()
		}
		for _, e := range extra {
			s.scratch.Add(e.v)
		}
		src = s.scratch
	}
	v, ok := src.Value(s.quantile)
	if !ok {
		return math.NaN()
	}
	return v
}
