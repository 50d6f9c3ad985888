package tallyward

import (
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
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
	own  []int32 // batch key indexes (event*entities + entity) the part applies, in order
	tag  [aheadRing]uint64
	pos  [aheadRing]int
	slot [aheadRing]*store.Slot[*record]
}

const (
	// aheadDepth is how many keys ahead the chain starts: one step per
	// key, four steps.
	aheadDepth = 4
	aheadRing  = 8 // > aheadDepth, a power of two
)

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
// its n-th key: each of the next keys moves one step on.
func stepAhead[E any](la *lookahead, ents []*entityState[E], w int, keys []string, n int) {
	ne := len(ents)
	tb := func(m int) *store.Table[*record] { return ents[int(la.own[m])%ne].parts[w] }
	if m := n + aheadDepth; m < len(la.own) {
		la.tag[m%aheadRing] = tb(m).HintIndex(keys[la.own[m]])
	}
	if m := n + aheadDepth - 1; m >= 0 && m < len(la.own) {
		la.pos[m%aheadRing] = tb(m).HintPos(la.tag[m%aheadRing])
	}
	if m := n + aheadDepth - 2; m >= 0 && m < len(la.own) {
		la.slot[m%aheadRing] = tb(m).HintSlot(la.pos[m%aheadRing])
	}
	if m := n + aheadDepth - 3; m >= 0 && m < len(la.own) {
		if sl := la.slot[m%aheadRing]; sl != nil {
			la.slot[m%aheadRing] = nil
			prefetch.Line(unsafe.Pointer(unsafe.StringData(sl.Key)))
			ents[int(la.own[m])%ne].lay.hint(sl.Value)
		}
	}
}

// hintEvent runs the chain of every key of one event step by step across
// its keys, so that their misses overlap each other, if not the work: for
// apply, which runs one event on the caller's goroutine (one worker, or
// Score) and sees no event ahead.
func (p *Pipeline[E]) hintEvent(keys []string) {
	la := &p.ahead
	if len(keys) > aheadRing {
		return
	}
	for i, key := range keys {
		if key != "" {
			la.tag[i] = p.ents[i].part(key).HintIndex(key)
		}
	}
	for i, key := range keys {
		if key != "" {
			la.pos[i] = p.ents[i].part(key).HintPos(la.tag[i])
		}
	}
	for i, key := range keys {
		if key != "" {
			la.slot[i] = p.ents[i].part(key).HintSlot(la.pos[i])
		}
	}
	for i, sl := range la.slot[:len(keys)] {
		if sl != nil {
			la.slot[i] = nil
			prefetch.Line(unsafe.Pointer(unsafe.StringData(sl.Key)))
			p.ents[i].lay.hint(sl.Value)
		}
	}
}
