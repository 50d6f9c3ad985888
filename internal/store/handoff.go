package store

import (
	"fmt"
	"runtime"
)

// A commit hands the dirty records to its goroutine without touching them
// on the caller's path. The cut only bumps the store's generation and
// hands the dirty list over: every slot on it whose dirtyIn is the frozen
// generation (Store.flightGen) is frozen, with no write to the slot. The
// commit's goroutine then encodes each frozen slot and moves its expiry
// index entry; the caller, before it can change a frozen slot (every
// change starts with Get, and eviction reads the value too), does both
// itself first. The slot's hand decides who does it, so the value is
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

// claimedBytes is what the caller made of a frozen slot: its bytes and the
// index move (from old to bucket) the commit must write.
type claimedBytes struct {
	b           []byte
	err         error
	old, bucket int64
}

// claim makes sure the commit in flight has sl's bytes and index move
// before the caller changes sl, making them here if the commit's
// goroutine has not. sl must be frozen (dirtyIn == flightGen).
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
				b, err := sl.Value.AppendBinary(nil)
				cb := &claimedBytes{b: b, err: err, old: sl.indexed, bucket: t.bucket(sl.Value.LastTime())}
				sl.indexed = cb.bucket
				sl.claimed = cb
				sl.hand.Store(done)
				return
			}
		}
	}
}

// freezeDirty is the caller's half of a cut at watermark w: it hands the
// dirty list to the commit (encodeFrozen), removing (in b) the dirty
// records already expired as of w, as expireDirty would; it returns how
// many. The walk over the list that finds them runs only when Touch saw a
// time that could be expired by w (dirtyLow), which a cut close behind
// the newest events does not: otherwise the cut touches no slot.
func (t *Table[V]) freezeDirty(b writer, w int64) (removed int, err error) {
	if t.expiredLow(t.dirtyLow, w) {
		for _, sl := range t.dirty {
			if !t.isDirty(sl) || !t.expiredAt(sl, w) {
				continue
			}
			if err := t.removeExpired(b, sl); err != nil {
				return removed, err
			}
			removed++
		}
	}
	// The commit's goroutine emptied t.frozen when it was done with it.
	t.frozen, t.dirty = t.dirty, t.frozen[:0]
	t.dirtyLow = maxTime
	return removed, nil
}

// encodeFrozen is the commit goroutine's half: it adds every frozen slot's
// record and index move to c, then empties t.frozen. It reads only t's
// fixed fields, t.frozen and the slots it wins the hand of (or their
// claimed, once the caller is done).
func (t *Table[V]) encodeFrozen(c *collector, gen uint64) error {
	busy, done := handBusy(gen), handDone(gen)
	var key, val []byte
	defer func() {
		clear(t.frozen)
		t.frozen = t.frozen[:0]
	}()
	for _, sl := range t.frozen {
		won := false
		for h := sl.hand.Load(); h != busy && h != done; h = sl.hand.Load() {
			if won = sl.hand.CompareAndSwap(h, busy); won {
				break
			}
		}
		if won {
			if sl.dirtyIn != gen {
				// Staged by an eviction or removed before the cut.
				sl.hand.Store(done)
				continue
			}
			var err error
			val, err = sl.Value.AppendBinary(val[:0])
			old, nb := sl.indexed, t.bucket(sl.Value.LastTime())
			sl.indexed = nb
			sl.hand.Store(done)
			key = RecordKey(key[:0], t.name, sl.Key)
			if err != nil {
				return fmt.Errorf("state: encode %q: %w", key, err)
			}
			c.Set(key, val, nil)
			key = t.moveEntry(c, key[:0], sl.Key, old, nb)
			continue
		}
		for sl.hand.Load() == busy {
			runtime.Gosched()
		}
		cb := sl.claimed
		if cb == nil {
			continue // not frozen after all (evicted before the cut)
		}
		sl.claimed = nil // the caller leaves it alone until the next cut
		key = RecordKey(key[:0], t.name, sl.Key)
		if cb.err != nil {
			return fmt.Errorf("state: encode %q: %w", key, cb.err)
		}
		c.Set(key, cb.b, nil)
		key = t.moveEntry(c, key[:0], sl.Key, cb.old, cb.bucket)
	}
	return nil
}

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
func encodeAll(tables []flusher, c *collector, gen uint64) error {
	for _, t := range tables {
		if err := t.encodeFrozen(c, gen); err != nil {
			return err
		}
	}
	return nil
}
