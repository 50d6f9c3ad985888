package tallyward

import (
	"fmt"
	"math"
)

// Peek appends to dst the features of one entity key as of time t (Unix
// ns), in the entity's feature order, read from state without processing
// an event: what a row of an event naming only this key at t would read,
// minus the event itself. Item features answer for the empty item. A key
// with no state reads as a new entity; an erased key reads NaN.
//
// Answers are exact for t at or after the newest event applied to the key
// minus MaxDisorder; further back each kind follows its documented as-of
// rule for times beyond its horizon. Peek changes nothing (the record
// cache may load the key). It is for tools and debugging (the command's
// inspect); scoring goes through Process or Score.
func (p *Pipeline[E]) Peek(entity, key string, t int64, dst []float64) ([]float64, error) {
	if err := p.usable(); err != nil {
		return dst, err
	}
	_, es, err := p.entity(entity)
	if err != nil {
		return dst, err
	}
	if key == "" {
		return dst, fmt.Errorf("tallyward: Peek: empty key")
	}
	aggs := es.zero
	sl, err := es.table.Get(key)
	switch {
	case err != nil:
		return dst, err
	case sl != nil && !es.expired(sl.Value, p.expiryClock()):
		aggs = sl.Value.aggs
	case sl == nil && p.store.Erased(es.ent.Name, key):
		for range es.kinds {
			dst = append(dst, math.NaN())
		}
		return dst, nil
	}
	for j, a := range aggs {
		at := t
		if es.ent.Features[j].BeforeEvent {
			if at == math.MinInt64 {
				a = es.zero[j] // nothing is before the first instant
			} else {
				at--
			}
		}
		var item uint64 // as the pipeline hashes an event without an item
		if es.ent.Features[j].Item != nil {
			item = p.items.hash("")
		}
		dst = append(dst, a.At(at, item))
	}
	return dst, nil
}
