package specfile

import (
	"fmt"
	"slices"
	"time"

	"github.com/tallyward/tallyward"
)

// Parameter keys of a feature, besides name, kind, when, value, item and
// before_event.
const (
	pWindow     = "window"
	pResolution = "resolution"
	pHalfLife   = "half_life"
	pStat       = "stat"
	pShort      = "short"
	pLong       = "long"
	pSmoothing  = "smoothing"
	pGap        = "gap"
	pPrecision  = "precision"
	pEpsilon    = "epsilon"
	pDelta      = "delta"
	pCapacity   = "capacity"
	pQ          = "q"
	pAccuracy   = "relative_accuracy"
)

// input says what a kind reads from an event.
type input uint8

const (
	inNone  input = iota
	inValue       // value: a number or bool field (optional; 1 when absent)
	inItem        // item: a string field (required)
)

type kindInfo struct {
	params []string
	input  func(f *featureDoc) input
	build  func(f *featureDoc, d durations) (tallyward.Kind, error)
}

// durations are the parsed duration parameters of one feature.
type durations map[string]time.Duration

func fixed(in input) func(*featureDoc) input { return func(*featureDoc) input { return in } }

func sliding(build func(tallyward.Sliding) tallyward.Kind, in input) kindInfo {
	return kindInfo{
		params: []string{pWindow, pResolution},
		input:  fixed(in),
		build: func(_ *featureDoc, d durations) (tallyward.Kind, error) {
			return build(tallyward.Sliding{Window: d[pWindow], Resolution: d[pResolution]}), nil
		},
	}
}

var decayStats = map[string]tallyward.DecayStat{
	"count": tallyward.DecayedCount, "sum": tallyward.DecayedSum,
	"mean": tallyward.DecayedMean, "variance": tallyward.DecayedVariance,
}

var recencyStats = map[string]tallyward.RecencyStat{
	"since_last": tallyward.SinceLast, "age": tallyward.Age, "session_events": tallyward.SessionEvents,
}

// kinds maps a spec file's kind names onto the Go API's kinds. Every
// parameter of each kind is reachable; defaults are the Go API's.
var kinds = map[string]kindInfo{
	"sliding_count": sliding(func(s tallyward.Sliding) tallyward.Kind { return tallyward.SlidingCount(s) }, inNone),
	"sliding_sum":   sliding(func(s tallyward.Sliding) tallyward.Kind { return tallyward.SlidingSum(s) }, inValue),
	"sliding_min":   sliding(func(s tallyward.Sliding) tallyward.Kind { return tallyward.SlidingMin(s) }, inValue),
	"sliding_max":   sliding(func(s tallyward.Sliding) tallyward.Kind { return tallyward.SlidingMax(s) }, inValue),
	"sliding_mean":  sliding(func(s tallyward.Sliding) tallyward.Kind { return tallyward.SlidingMean(s) }, inValue),
	"decayed": {
		params: []string{pHalfLife, pStat},
		input: func(f *featureDoc) input {
			if f.Stat == "" || f.Stat == "count" {
				return inNone
			}
			return inValue
		},
		build: func(f *featureDoc, d durations) (tallyward.Kind, error) {
			st, ok := decayStats[orText(f.Stat, "count")]
			if !ok {
				return nil, fmt.Errorf("%s: %q is not one of count, sum, mean, variance", pStat, f.Stat)
			}
			return tallyward.Decayed{HalfLife: d[pHalfLife], Stat: st}, nil
		},
	},
	"velocity": {
		params: []string{pShort, pLong, pResolution, pSmoothing},
		input:  fixed(inNone),
		build: func(f *featureDoc, d durations) (tallyward.Kind, error) {
			return tallyward.Velocity{Short: d[pShort], Long: d[pLong], Resolution: d[pResolution], Smoothing: deref(f.Smoothing)}, nil
		},
	},
	"recency": {
		params: []string{pStat, pGap},
		input:  fixed(inNone),
		build: func(f *featureDoc, d durations) (tallyward.Kind, error) {
			st, ok := recencyStats[orText(f.Stat, "since_last")]
			if !ok {
				return nil, fmt.Errorf("%s: %q is not one of since_last, age, session_events", pStat, f.Stat)
			}
			return tallyward.Recency{Stat: st, Gap: d[pGap]}, nil
		},
	},
	"distinct": {
		params: []string{pWindow, pResolution, pPrecision},
		input:  fixed(inItem),
		build: func(f *featureDoc, d durations) (tallyward.Kind, error) {
			p := deref(f.Precision)
			if p < 0 || p > 255 {
				return nil, fmt.Errorf("%s: %d is out of range", pPrecision, p)
			}
			return tallyward.Distinct{Window: d[pWindow], Resolution: d[pResolution], Precision: uint8(p)}, nil
		},
	},
	"distinct_ever": {
		params: []string{pPrecision},
		input:  fixed(inItem),
		build: func(f *featureDoc, _ durations) (tallyward.Kind, error) {
			p := deref(f.Precision)
			if p < 0 || p > 255 {
				return nil, fmt.Errorf("%s: %d is out of range", pPrecision, p)
			}
			return tallyward.DistinctEver{Precision: uint8(p)}, nil
		},
	},
	"surge": {
		params: []string{pWindow, pHalfLife, pResolution, pSmoothing},
		input:  fixed(inNone),
		build: func(f *featureDoc, d durations) (tallyward.Kind, error) {
			return tallyward.Surge{Window: d[pWindow], HalfLife: d[pHalfLife], Resolution: d[pResolution], Smoothing: deref(f.Smoothing)}, nil
		},
	},
	"frequency": {
		params: []string{pEpsilon, pDelta},
		input:  fixed(inItem),
		build: func(f *featureDoc, _ durations) (tallyward.Kind, error) {
			return tallyward.Frequency{Epsilon: deref(f.Epsilon), Delta: deref(f.Delta)}, nil
		},
	},
	"top_share": {
		params: []string{pCapacity},
		input:  fixed(inItem),
		build: func(f *featureDoc, _ durations) (tallyward.Kind, error) {
			return tallyward.TopShare{Capacity: deref(f.Capacity)}, nil
		},
	},
	"quantile": {
		params: []string{pQ, pAccuracy},
		input:  fixed(inValue),
		build: func(f *featureDoc, _ durations) (tallyward.Kind, error) {
			if f.Q == nil {
				return nil, fmt.Errorf("%s: required by quantile", pQ)
			}
			return tallyward.Quantile{Q: *f.Q, RelativeAccuracy: deref(f.RelativeAccuracy)}, nil
		},
	},
}

func deref[T any](p *T) T {
	var zero T
	if p == nil {
		return zero
	}
	return *p
}

func orText(s, def string) string {
	if s == "" {
		return def
	}
	return s
}

// setParams lists the parameter keys a feature entry sets.
func (f *featureDoc) setParams() []string {
	var out []string
	add := func(set bool, name string) {
		if set {
			out = append(out, name)
		}
	}
	add(f.Window != "", pWindow)
	add(f.Resolution != "", pResolution)
	add(f.HalfLife != "", pHalfLife)
	add(f.Stat != "", pStat)
	add(f.Short != "", pShort)
	add(f.Long != "", pLong)
	add(f.Smoothing != nil, pSmoothing)
	add(f.Gap != "", pGap)
	add(f.Precision != nil, pPrecision)
	add(f.Epsilon != nil, pEpsilon)
	add(f.Delta != nil, pDelta)
	add(f.Capacity != nil, pCapacity)
	add(f.Q != nil, pQ)
	add(f.RelativeAccuracy != nil, pAccuracy)
	return out
}

// durationParams maps duration keys to their text in f.
func (f *featureDoc) durationParams() map[string]string {
	return map[string]string{pWindow: f.Window, pResolution: f.Resolution, pHalfLife: f.HalfLife,
		pShort: f.Short, pLong: f.Long, pGap: f.Gap}
}

// KindNames lists the kind names a spec file accepts, sorted.
func KindNames() []string {
	names := make([]string, 0, len(kinds))
	for k := range kinds {
		names = append(names, k)
	}
	slices.Sort(names)
	return names
}
