package tallyward

import (
	"github.com/tallyward/tallyward/internal/store"
)

// lookahead has a worker's next records brought into the processor's
// caches while it applies the ones before them. A record of a cache
// larger than those caches costs a chain of misses to reach (index
// entry, slot position, slot, then key and record), each a hundred
// nanoseconds or more, and a worker would otherwise wait for every one in
// turn. With the batch's keys known in advance, each key takes one step
// of the chain per key applied before it (see store.Table.HintIndex), so
// the misses of several keys are in flight together behind the work.
//
// It only hints: what it brings in may have moved by the time it is used,
// which costs the miss it meant to save and nothing else.
type lookahead struct {
	own   []int32 // batch key indexes (event*entities + entity) the part applies, in order
	chain [aheadRing]hintChain
}

// hintChain is one key's way along the chain of misses: the store's
// (store.HintChain), then one step of its own.
type hintChain struct {
	tb     *store.Table[*record]
	chain  store.HintChain[*record]
	hinted *store.Slot[*record] // the slot whose record the store's last step hinted
}

const (
	// aheadSteps is the chain's length: the store's steps (index entry,
	// slot position, slot, key and record), then what the record's
	// aggregates keep outside it (panes, exact entries).
	aheadSteps = store.HintSteps + 1
	// aheadDepth is how many keys ahead a worker starts a chain: one
	// step per key, with a key's gap between the record's step and the
	// last, which reads the record: without it the last step waited for
	// the record and cost more than it saved (six-feature workload, two
	// workers: the workers' CPU 11.56 s against 11.17 s without the last
	// step); with it, four alternating pairs measured 432, 394, 409 and
	// 418k events/s against 404, 389, 376 and 416k.
	aheadDepth = aheadSteps + 1
	aheadRing  = 8 // > aheadDepth, a power of two
)

// step takes step i of the chain of key (of table tb, needed at step 0;
// records laid out by lay): each reads only what the step before brought
// in.
func (c *hintChain) step(i int, tb *store.Table[*record], key string, lay *recordLayout) {
	if i == 0 {
		c.tb = tb
	}
	if i < store.HintSteps {
		if sl := c.chain.Step(c.tb, i, key); sl != nil {
			c.hinted = sl
		}
		return
	}
	// Reading the record races with the commit in flight encoding it,
	// unless the table says otherwise.
	if sl := c.hinted; sl != nil {
		c.hinted = nil
		if r := sl.Value; r != nil && c.tb.Readable(sl) {
			lay.hintOutside(r)
		}
	}
}

// planAhead lists the keys part w applies in keys (a batch's, owner its
// parts) and starts the chain of the first ones.
func planAhead[E any](la *lookahead, ents []*entityState[E], w int, keys []string, owner []int32) {
	la.own = la.own[:0]
	for k, key := range keys {
		if owner[k] == int32(w) && key != "" {
			la.own = append(la.own, int32(k))
		}
	}
	for n := -aheadDepth; n < 0; n++ {
		stepAhead(la, ents, w, keys, n)
	}
}

// stepAhead runs the chain's steps due when the part is about to apply
// its n-th key: each of the next aheadDepth keys moves one step on.
func stepAhead[E any](la *lookahead, ents []*entityState[E], w int, keys []string, n int) {
	for i := range aheadSteps {
		if m := n + aheadDepth - i; m >= 0 && m < len(la.own) {
			k := int(la.own[m])
			es := ents[k%len(ents)]
			la.chain[m%aheadRing].step(i, es.parts[w], keys[k], es.lay)
		}
	}
}

// hintEvent takes the chains of every key of one event step by step
// across its keys, so that their misses overlap each other, if not the
// work: for apply, which runs one event on the caller's goroutine (one
// worker, or Score) and sees no event ahead.
func (p *Pipeline[E]) hintEvent(keys []string) {
	if len(keys) > aheadRing {
		return
	}
	chains := p.ahead.chain[:len(keys)]
	for i := range aheadSteps {
		for j, key := range keys {
			if key != "" {
				es := p.ents[j]
				var tb *store.Table[*record]
				if i == 0 {
					tb = es.part(key)
				}
				chains[j].step(i, tb, key, es.lay)
			}
		}
	}
}
