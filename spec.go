package tallyward

import (
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/tallyward/tallyward/window"
)

// Spec describes what a pipeline computes over events of type E.
//
// Features are grouped by entity (account, card, device, address...): all
// features of one entity share one stored record per entity key, so an
// event costs one lookup and at most one write per entity it names, not one
// per feature.
type Spec[E any] struct {
	// Time returns the event time in Unix nanoseconds. Required.
	Time func(E) int64

	// Entities lists the entity kinds and their features. Names are stable
	// identities: they key stored state.
	Entities []Entity[E]

	// Emit receives every emitted row. Required in Settled mode (it is the
	// only way rows come out); optional in Eager mode, where Score also
	// returns them. Row.Values is only valid during the call.
	Emit func(Row[E])

	// OnLate receives late events under the DivertLate policy. Required for
	// that policy.
	OnLate func(E)

	// OnWatermark, if set, is called each time the watermark rises, with
	// the new watermark, after every row the rise releases has gone to
	// Emit: from then on every row with a time below w has been emitted
	// (Settled mode), and any later event below w is late. Joins use it to
	// release what waited for time to pass. Flush calls it with
	// math.MaxInt64. Default: nil.
	OnWatermark func(w int64)
}

// Entity is one kind of keyed subject and the features kept per key.
type Entity[E any] struct {
	// Name identifies the entity kind in stored state, e.g. "card".
	Name string
	// Key returns the entity key of an event. An empty key means the event
	// names no such entity: its features are NaN in the row and nothing is
	// applied.
	Key func(E) string
	// Features kept per entity key, in output order.
	Features []Feature[E]
}

// Feature is one aggregate kept per entity key.
type Feature[E any] struct {
	// Name identifies the feature within its entity, e.g. "failed_10m".
	// Rows and stored definitions call it "<entity>.<feature>", which must
	// be unique across the spec: entity "a" with feature "b.c" and entity
	// "a.b" with feature "c" are refused.
	Name string
	// Kind is the aggregate and its parameters, e.g. SlidingCount{...}.
	Kind Kind
	// Where selects the events that update this feature. Nil means every
	// event. Rows report the feature for every event regardless.
	Where func(E) bool
	// Value extracts the number aggregated by value kinds. Nil means 1.
	// A value that is NaN, infinite or beyond ±MaxValue rejects the whole
	// event (reason BadValue).
	Value func(E) float64
	// Item extracts the thing counted by item kinds (distinct counts,
	// frequencies). Nil means the empty item.
	Item func(E) string
	// BeforeEvent reports the feature as of just before the event's time:
	// neither the event nor events at the same time are included. The
	// default includes them.
	BeforeEvent bool
}

// MaxValue bounds the magnitude of Feature.Value. It is the bound the
// decayed statistics need to keep variance from overflowing (package
// window's MaxDecayedValue), applied to every kind alike so that no kind
// silently refuses a value another takes, and so that a sliding sum of
// values within it cannot reach ±Inf: 2^1024 / 1e30 ≈ 1.8e278 events
// would be needed.
const MaxValue = window.MaxDecayedValue

// Row is the features of one event.
type Row[E any] struct {
	Seq    uint64 // the event's position in the source
	Time   int64  // the event's time
	Event  E
	Late   bool      // applied under ApplyLate after the watermark passed it
	Values []float64 // one per feature in Names order; valid only during Emit
}

// Kind is an aggregate definition: what one feature keeps per entity key
// and how it answers. The built-in kinds (SlidingCount, Decayed, Distinct,
// ...) are implemented through this interface like any other; a user may
// implement it for an aggregate of their own (see examples/kinds for one,
// persisted, replayed and checked against brute force).
//
// # The contract of a kind
//
// Describe is the kind's identity in stored state: the canonical text of
// every parameter that shapes what an aggregate stores or answers, spelled
// out including defaults (so writing a default explicitly is not a change).
// It is fingerprinted with the state; a different text on reopen is a
// definition change (Open fails with ErrDefinitionChanged unless the
// feature is listed in Options.ResetFeatures). Start it with a name no
// other kind uses.
//
// NewAggregate returns an empty aggregate. horizon is how far behind its
// newest event an aggregate must still answer as-of queries exactly and
// accept events (the pipeline's MaxDisorder plus 1 ns); events older than
// that may be folded coarsely or refused. The store records MaxDisorder,
// and a change of it is a definition change of every feature, so an
// aggregate is only ever decoded under the horizon it was built with.
//
// # The encoding contract
//
// AppendBinary/UnmarshalBinary are the aggregate's persisted format. The
// first byte must be a format version. Once a store holds a version, every
// later build of the kind must keep decoding it: a new layout is a new
// version number, never an edit of an old one; retired numbers are never
// reused. UnmarshalBinary is given bytes written by an aggregate of the
// same Describe text; it must reject unknown versions, truncated input and
// trailing bytes with an error (never panic) and leave the receiver
// unchanged on error. Changing what a stored state means without a new
// Describe text is a silent wrong answer: change the Describe text, which
// makes users reset the feature and backfill.
type Kind interface {
	// Describe is the canonical text of every parameter that shapes
	// stored state (see above).
	Describe() string
	// Validate reports every problem with the parameters.
	Validate() error
	// Inputs says what the kind reads from an event besides its time.
	Inputs() Inputs
	// Reach is how long after an entity's newest event this feature's
	// state can still change an answer; 0 means unbounded. The default
	// TTL of an entity is its features' longest reach plus MaxDisorder.
	Reach() time.Duration
	// NewAggregate returns an empty aggregate (see above). It is called
	// only after Validate returned nil.
	NewAggregate(horizon time.Duration) Aggregate
}

// HorizonChecker is implemented by a Kind whose validity depends on the
// pipeline's horizon (MaxDisorder plus 1 ns), e.g. a window whose pane
// count grows with it. Open calls it after Validate.
type HorizonChecker interface {
	CheckHorizon(horizon time.Duration) error
}

// Inputs is a set of what a kind reads from an event.
type Inputs uint8

const (
	// TakesValue: the kind aggregates Feature.Value (1 when nil). NaN,
	// infinite values and values beyond ±MaxValue reject the whole event
	// before any state changes.
	TakesValue Inputs = 1 << iota
	// TakesItem: the kind counts Feature.Item, which the pipeline hashes
	// to 64 bits before Add and At see it, with the store's item key (see
	// the package doc, Item hashes).
	TakesItem
)

// Aggregate is one feature's state for one entity key. The pipeline calls
// it from one goroutine at a time.
type Aggregate interface {
	// Add applies one event at time t with its value (0 unless the kind
	// takes values) and item hash (0 unless it takes items). It returns
	// false if the event is older than the aggregate keeps (counted in
	// Stats.TooOld).
	Add(t int64, value float64, item uint64) bool
	// At answers as of time t: no event newer than t may count. item is
	// the asking event's item hash, for kinds that answer about it.
	At(t int64, item uint64) float64
	// Newest returns the newest event time added; ok is false if none.
	Newest() (t int64, ok bool)
	// AppendBinary appends the versioned encoding (see Kind).
	AppendBinary(dst []byte) ([]byte, error)
	// UnmarshalBinary replaces the state with a decoded encoding.
	UnmarshalBinary(b []byte) error
	// SizeBytes estimates the heap the aggregate holds, for the cache's
	// memory bound.
	SizeBytes() int
}

// reachNanos is a kind's reach in ns, saturated (0: unbounded).
func reachNanos(k Kind) int64 { return max(int64(k.Reach()), 0) }

func (s *Spec[E]) validate(horizon int64) error {
	var errs []error
	if s.Time == nil {
		errs = append(errs, errors.New("tallyward: Spec.Time is required"))
	}
	if len(s.Entities) == 0 {
		errs = append(errs, errors.New("tallyward: Spec.Entities is empty"))
	}
	seen := map[string]bool{}
	// Rows, stored definitions and Options.ResetFeatures name a feature
	// "entity.feature"; names may contain dots, so two different pairs
	// can join to one name. Such a spec is refused.
	joined := map[string][2]string{}
	for i, ent := range s.Entities {
		switch {
		case !validName(ent.Name):
			errs = append(errs, fmt.Errorf("tallyward: entity %d: name %q must be non-empty [A-Za-z0-9_.-]", i, ent.Name))
		case seen[ent.Name]:
			errs = append(errs, fmt.Errorf("tallyward: entity %q defined twice", ent.Name))
		}
		seen[ent.Name] = true
		if ent.Key == nil {
			errs = append(errs, fmt.Errorf("tallyward: entity %q: Key is required", ent.Name))
		}
		if len(ent.Features) == 0 {
			errs = append(errs, fmt.Errorf("tallyward: entity %q has no features", ent.Name))
		}
		fseen := map[string]bool{}
		for j, f := range ent.Features {
			where := fmt.Sprintf("tallyward: feature %s.%s", ent.Name, f.Name)
			switch {
			case !validName(f.Name):
				errs = append(errs, fmt.Errorf("tallyward: entity %q feature %d: name %q must be non-empty [A-Za-z0-9_.-]", ent.Name, j, f.Name))
			case fseen[f.Name]:
				errs = append(errs, fmt.Errorf("%s defined twice", where))
			}
			fseen[f.Name] = true
			if name := ent.Name + "." + f.Name; validName(ent.Name) && validName(f.Name) {
				if prev, ok := joined[name]; ok && prev != [2]string{ent.Name, f.Name} {
					errs = append(errs, fmt.Errorf("tallyward: entity %q feature %q and entity %q feature %q both read %q: rename one", prev[0], prev[1], ent.Name, f.Name, name))
				}
				joined[name] = [2]string{ent.Name, f.Name}
			}
			if f.Kind == nil {
				errs = append(errs, fmt.Errorf("%s: Kind is required", where))
				continue
			}
			if err := f.Kind.Validate(); err != nil {
				errs = append(errs, fmt.Errorf("%s: %w", where, err))
			} else if hc, ok := f.Kind.(HorizonChecker); ok {
				if err := hc.CheckHorizon(time.Duration(horizon)); err != nil {
					errs = append(errs, fmt.Errorf("%s with MaxDisorder %v: %w", where, time.Duration(horizon), err))
				}
			}
			if f.Kind.Inputs()&TakesItem == 0 && f.Item != nil {
				errs = append(errs, fmt.Errorf("%s: Item is set but %s does not count items", where, f.Kind.Describe()))
			}
			if f.Kind.Inputs()&TakesValue == 0 && f.Value != nil {
				errs = append(errs, fmt.Errorf("%s: Value is set but %s takes no value", where, f.Kind.Describe()))
			}
		}
	}
	return errors.Join(errs...)
}

func validName(s string) bool {
	if s == "" || len(s) > 200 {
		return false
	}
	return strings.IndexFunc(s, func(r rune) bool {
		return !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '_' || r == '.' || r == '-')
	}) < 0
}
