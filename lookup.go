package tallyward

import "errors"

// ErrEmptyKey is returned by Lookup for an empty entity key.
var ErrEmptyKey = errors.New("tallyward: empty entity key")

// Lookup appends to dst the features of one entity key as of time t, in
// the entity's feature order (the entity's slice of Names), without
// applying any event: for scoring a request that is not itself an event of
// the stream, and as the building block of joins.
//
// As-of semantics are those of rows: nothing newer than t counts, and an
// event at t counts (BeforeEvent does not apply: a lookup is not an event;
// ask for t−1 to leave time t out). Item features that answer about the
// asking event's item (Frequency) answer as for an event with no item.
//
// exact reports whether the answer is exact. Each aggregate is exact for a
// t no further than the pipeline's horizon (MaxDisorder + 1 ns) behind the
// key's newest applied event; an older t follows the aggregate's
// documented degraded rule (windows count only the panes wholly before
// the asked one, Decayed answers NaN, lifetime summaries include events up
// to the horizon cut), and exact is false. A t at or above
// Watermark() − 1 is always exact.
//
// A key never seen, expired, or erased answers like a new entity (exact).
// Lookup never creates state, so an erased key stays erased. A hit in the
// record cache allocates nothing; a miss reads the store once and caches
// the record.
//
// In Settled mode the answer covers the events applied so far, that is
// those below the watermark; held events are not yet applied.
func (p *Pipeline[E]) Lookup(entity, key string, t int64, dst []float64) (_ []float64, exact bool, err error) {
	if err := p.usable(); err != nil {
		return dst, false, err
	}
	if err := p.finishWork(); err != nil {
		return dst, false, err
	}
	var es *entityState[E]
	for _, e := range p.ents {
		if e.ent.Name == entity {
			es = e
			break
		}
	}
	if es == nil {
		_, _, err := p.entity(entity)
		return dst, false, err
	}
	if key == "" {
		return dst, false, ErrEmptyKey
	}
	exact = true
	sl, err := es.part(key).Get(key)
	if err != nil {
		p.err = err
		return dst, false, err
	}
	var rec *record
	if sl != nil && !es.expired(sl.Value, p.expiryClock()) {
		rec = sl.Value
		exact = t >= rec.last-es.horizon
	}
	for j, a := range es.zero {
		if rec != nil {
			a = rec.agg(j)
		}
		dst = append(dst, a.At(t, 0))
	}
	return dst, exact, nil
}
