package store

import (
	"fmt"
	"runtime"
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
)

// A commit hands the dirty records to its goroutine without touching them
// on the caller's path. The cut only bumps the store's generation and
// hands the dirty list over: every slot on it whose dirtyIn is the frozen
// generation (Store.flightGen) is frozen, with no write to the slot. The
// commit's goroutine then encodes each frozen slot and moves its expiry
// index entry (or deletes both, for a record the sweep watermark
// expired); the caller, before it can change a frozen slot (every change
// starts with Get, and eviction reads the value too), does that itself
// first. The slot's hand decides who does it, so the value is
// never read by one side while the other changes it:
//
//	older generation --CAS by either side--> busy(F) --> done(F)
//
// where F is the frozen generation. The caller's bytes and index move, if
// it made them, wait in claimed for the commit's goroutine to take. A hit
// on a slot that is not frozen costs one compare.
//
// hand holds 2·F (busy) or 2·F+1 (done), truncated to 32 bits: a slot is
// compared only with the generation it was dirtied in, which would have
// to lie 2^30 commits back to be taken for done.
func handBusy(gen uint64) int32 { return int32(gen << 1) }
func handDone(gen uint64) int32 { return int32(gen<<1 | 1) }

// claimedBytes is what the caller made of a frozen slot: its bytes (or,
// for a record the cut's sweep watermark expired, its deletion) and the
// index move (from old to bucket) the commit must write.
type claimedBytes struct {
	b           []byte
	err         error
	del         bool
	old, bucket int64
}

// claim makes sure the commit in flight has sl's bytes and index move
// before the caller changes sl, making them here if the commit's
// goroutine has not. sl must be frozen (dirtyIn == flightGen). Both sides
// judge a frozen record by the same rule (swept): once claim returns,
// sl.indexed is its bucket, and a record the commit deletes reads as
// swept away (see Get).
func (t *Table[V]) claim(sl *Slot[V]) {
	f := t.store.flightGen
	busy, done := handBusy(f), handDone(f)
	for {
		switch h := sl.hand.Load(); h {
		case done:
			return
		case busy:
			// The commit's goroutine is encoding this one record.
			runtime.Gosched()
		default:
			if sl.hand.CompareAndSwap(h, busy) {
				cb := t.handOver(sl, t.store.sweepW, nil)
				sl.claimed = &cb
				sl.hand.Store(done)
				return
			}
		}
	}
}

// handOver makes what a commit sweeping at w needs of the frozen sl (its
// bytes, appended to buf, or its deletion, and its index move) and sets
// sl.indexed to the record's bucket. The side holding sl's hand calls it.
func (t *Table[V]) handOver(sl *Slot[V], w int64, buf []byte) claimedBytes {
	nb := t.bucket(sl.Value.LastTime())
	cb := claimedBytes{old: sl.indexed, bucket: nb, del: swept(nb, w)}
	if !cb.del {
		cb.b, cb.err = sl.Value.AppendBinary(buf)
	}
	sl.indexed = nb
	return cb
}

// swept reports whether a record in expiry bucket b is removed by a sweep
// at watermark w: every commit sweeps at the store's sweep watermark, and
// judges a record by its own bucket (its expiry rounded up), so that
// which records a commit removes follows from their contents alone.
func swept(b, w int64) bool { return b != 0 && b <= w }

// freezeDirty is the caller's half of a cut: it hands the dirty list to
// the commit (encodeFrozen) without touching a slot.
func (t *Table[V]) freezeDirty(writer, int64) (int, error) {
	// The commit's goroutine emptied t.frozen when it was done with it.
	t.frozen, t.dirty = t.dirty, t.frozen[:0]
	return 0, nil
}

// encodeFrozen is the commit goroutine's half: it adds every frozen slot's
// record and index move to c, or, for a record swept at w, its deletion
// (noting its key in gone), then empties t.frozen. It returns how many
// records it deleted. It reads
// only t's fixed fields, t.frozen and the slots it wins the hand of (or
// their claimed, once the caller is done).
func (t *Table[V]) encodeFrozen(c *collector, gen uint64, w int64, gone *removedKeys) (removed int, err error) {
	busy, done := handBusy(gen), handDone(gen)
	var key, val []byte
	defer func() {
		clear(t.frozen)
		t.frozen = t.frozen[:0]
	}()
	// The hand of each slot is won a few slots ahead and its value
	// hinted then (see HintValue), so the misses on the next records'
	// memory overlap the encoding of this one. A slot won ahead is held
	// until its turn: a caller wanting it waits, as for one being encoded.
	frozen := t.frozen
	// held[j%encodeRing] is frozen[j] while this goroutine holds its hand
	// won ahead, and was its hand before: on an early return it is given
	// back, so that the caller can still claim it.
	var held [encodeRing]struct {
		sl   *Slot[V]
		prev int32
	}
	defer func() {
		for _, h := range held {
			if h.sl != nil {
				h.sl.hand.Store(h.prev)
			}
		}
	}()
	winAhead := func(j int) {
		sl := frozen[j]
		for h := sl.hand.Load(); h != busy && h != done; h = sl.hand.Load() {
			if sl.hand.CompareAndSwap(h, busy) {
				held[j%encodeRing].sl, held[j%encodeRing].prev = sl, h
				break
			}
		}
		if held[j%encodeRing].sl != nil && sl.dirtyIn == gen {
			t.hintContents(sl)
		}
	}
	for j := range min(encodeAhead, len(frozen)) {
		winAhead(j)
	}
	for i, sl := range frozen {
		if j := i + 2*encodeAhead; j < len(frozen) {
			prefetch.Line(unsafe.Pointer(frozen[j]))
		}
		if j := i + encodeAhead; j < len(frozen) {
			winAhead(j)
		}
		won := held[i%encodeRing].sl != nil
		held[i%encodeRing].sl = nil
		var cb claimedBytes
		if won {
			if sl.dirtyIn != gen {
				// Staged by an eviction before the cut.
				sl.hand.Store(done)
				continue
			}
			cb = t.handOver(sl, w, val[:0])
			if cb.b != nil {
				val = cb.b
			}
			sl.hand.Store(done)
		} else {
			for sl.hand.Load() == busy {
				runtime.Gosched()
			}
			p := sl.claimed
			if p == nil {
				continue // a slot listed twice: taken the first time
			}
			sl.claimed = nil // the caller leaves it alone until the next cut
			cb = *p
		}
		key = RecordKey(key[:0], t.name, sl.Key)
		if cb.err != nil {
			return removed, fmt.Errorf("state: encode %q: %w", key, cb.err)
		}
		if cb.del {
			c.Delete(key, nil)
			key = t.moveEntry(c, key[:0], sl.Key, cb.old, 0)
			gone.add(t.name, sl.Key, t.part)
			removed++
			continue
		}
		c.Set(key, cb.b, nil)
		key = t.moveEntry(c, key[:0], sl.Key, cb.old, cb.bucket)
	}
	return removed, nil
}

// encodeFrozen wins slots' hands encodeAhead slots before their turn and
// brings in the slots themselves twice that far ahead.
const (
	encodeAhead = 4
	encodeRing  = 8 // > encodeAhead, a power of two
)

// moveEntry writes to c the move of entity's expiry index entry from
// bucket old to nb (0: none), using buf; it returns buf for reuse.
func (t *Table[V]) moveEntry(c *collector, buf []byte, entity string, old, nb int64) []byte {
	if nb == old {
		return buf
	}
	if old != 0 {
		buf = expiryKey(buf[:0], old, t.name, entity)
		c.Delete(buf, nil)
	}
	if nb != 0 {
		buf = expiryKey(buf[:0], nb, t.name, entity)
		c.Set(buf, nil, nil)
	}
	return buf
}

// encodeAll runs encodeFrozen over every table.
func encodeAll(tables []flusher, c *collector, gen uint64, w int64, gone *removedKeys) (removed int, err error) {
	for _, t := range tables {
		n, err := t.encodeFrozen(c, gen, w, gone)
		removed += n
		if err != nil {
			return removed, err
		}
	}
	return removed, nil
}
