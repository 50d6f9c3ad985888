package tallyward

import (
	"errors"
	"fmt"
	"strings"
	"time"
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
	Name string
	// Kind is the aggregate and its parameters, e.g. SlidingCount{...}.
	Kind Kind
	// Where selects the events that update this feature. Nil means every
	// event. Rows report the feature for every event regardless.
	Where func(E) bool
	// Value extracts the number aggregated by value kinds. Nil means 1.
	// NaN and infinite values reject the whole event.
	Value func(E) float64
	// Item extracts the thing counted by item kinds (distinct counts,
	// frequencies). Nil means the empty item.
	Item func(E) string
	// BeforeEvent reports the feature as of just before the event's time:
	// neither the event nor events at the same time are included. The
	// default includes them.
	BeforeEvent bool
}

// Row is the features of one event.
type Row[E any] struct {
	Seq    uint64 // the event's position in the source
	Time   int64  // the event's time
	Event  E
	Late   bool      // applied under ApplyLate after the watermark passed it
	Values []float64 // one per feature in Names order; valid only during Emit
}

// Kind is an aggregate definition. The kinds are the types of this package
// (SlidingCount, ...); each maps onto an aggregate of package window or
// sketch.
type Kind interface {
	// Describe is the canonical text of every parameter that shapes stored
	// state. It is stored with the state and compared on open: a change
	// is a definition change.
	Describe() string
	// Validate reports every problem with the parameters.
	Validate() error

	newAggregate(horizon int64) aggregate
	input() inputKind
	// reach is how long after an entity's newest event this feature's
	// state can still change an answer, in ns; 0 means unbounded.
	reach() int64
}

type inputKind uint8

const (
	inputNone  inputKind = iota // the event itself is the input
	inputValue                  // a float64 value
	inputItem                   // a hashed item
)

// aggregate is one feature's state for one entity key.
type aggregate interface {
	add(t int64, v float64, item uint64) bool
	// at answers as of t; item is the asking event's item, for kinds that
	// answer about it (frequency).
	at(t int64, item uint64) float64
	AppendBinary(dst []byte) ([]byte, error)
	UnmarshalBinary(b []byte) error
	SizeBytes() int
}

// horizonValidator is a Kind whose validity depends on the pipeline's
// horizon (its allowed disorder).
type horizonValidator interface {
	validateWith(horizon int64) error
}

func (s *Spec[E]) validate(horizon int64) error {
	var errs []error
	if s.Time == nil {
		errs = append(errs, errors.New("tallyward: Spec.Time is required"))
	}
	if len(s.Entities) == 0 {
		errs = append(errs, errors.New("tallyward: Spec.Entities is empty"))
	}
	seen := map[string]bool{}
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
			if f.Kind == nil {
				errs = append(errs, fmt.Errorf("%s: Kind is required", where))
				continue
			}
			if err := f.Kind.Validate(); err != nil {
				errs = append(errs, fmt.Errorf("%s: %w", where, err))
			} else if hv, ok := f.Kind.(horizonValidator); ok {
				if err := hv.validateWith(horizon); err != nil {
					errs = append(errs, fmt.Errorf("%s with MaxDisorder %v: %w", where, time.Duration(horizon), err))
				}
			}
			if f.Kind.input() != inputItem && f.Item != nil {
				errs = append(errs, fmt.Errorf("%s: Item is set but %s does not count items", where, f.Kind.Describe()))
			}
			if f.Kind.input() != inputValue && f.Value != nil {
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
