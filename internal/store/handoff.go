package store

import (
	"fmt"
	"runtime"
)

// A commit hands the dirty records to its goroutine without encoding them
// on the caller's path. At the freeze every dirty slot is marked frozen;
// the commit's goroutine then encodes each frozen slot, and the caller,
// before it can change a frozen slot (every change starts with Get, and
// eviction reads the value too), encodes it first itself. A slot's state
// decides who encodes it, so the value is never read by one side while
// the other changes it:
//
//	idle/encoded --freeze--> frozen --CAS by either side--> encoding --> encoded
//
// The caller's copy, if it made one, waits in claimed for the commit's
// goroutine to take it. A hit on a slot that is not frozen costs one
// atomic load.
const (
	slotIdle     int32 = iota // no commit in flight needs this slot's bytes
	slotFrozen                // the commit in flight needs them, not yet encoded
	slotEncoding              // being encoded by one side
	slotEncoded               // encoded; by the caller if claimed is set
)

type claimedBytes struct {
	b   []byte
	err error
}

// claim makes sure the commit in flight has sl's bytes before the caller
// changes sl, encoding them here if the commit's goroutine has not.
func (sl *Slot[V]) claim() {
	for {
		switch sl.state.Load() {
		case slotFrozen:
			if sl.state.CompareAndSwap(slotFrozen, slotEncoding) {
				b, err := sl.Value.AppendBinary(nil)
				sl.claimed = &claimedBytes{b: b, err: err}
				sl.state.Store(slotEncoded)
				return
			}
		case slotEncoding:
			// The commit's goroutine is encoding this one record.
			runtime.Gosched()
		default:
			return
		}
	}
}

// freezeDirty is the caller's half: it moves the expiry index entries of
// dirty slots (in b) and marks the slots frozen for encodeFrozen. Dirty
// records already expired as of w are removed instead (as expireDirty
// would, in the same walk over the dirty list); it returns how many.
func (t *Table[V]) freezeDirty(b writer, w int64) (removed int, err error) {
	clear(t.frozen)
	t.frozen = t.frozen[:0]
	for _, sl := range t.dirty {
		if !sl.dirty {
			continue
		}
		if t.expiredAt(sl, w) {
			if err := t.removeExpired(b, sl); err != nil {
				return removed, err
			}
			removed++
			continue
		}
		if err := t.moveIndex(b, sl); err != nil {
			return removed, err
		}
		sl.dirty = false
		sl.taken = t.store.gen
		sl.claimed = nil
		sl.state.Store(slotFrozen)
		t.frozen = append(t.frozen, sl)
	}
	clear(t.dirty)
	t.dirty = t.dirty[:0]
	return removed, nil
}

// encodeFrozen is the commit goroutine's half: it adds every frozen
// slot's record to c. It reads only t.name, t.frozen and the slots' Key,
// Value (while it holds them), state and claimed.
func (t *Table[V]) encodeFrozen(c *collector) error {
	var key, val []byte
	for _, sl := range t.frozen {
		key = RecordKey(key[:0], t.name, sl.Key)
		if sl.state.CompareAndSwap(slotFrozen, slotEncoding) {
			var err error
			val, err = sl.Value.AppendBinary(val[:0])
			sl.state.Store(slotEncoded)
			if err != nil {
				return fmt.Errorf("state: encode %q: %w", key, err)
			}
			c.Set(key, val, nil)
			continue
		}
		for sl.state.Load() == slotEncoding {
			runtime.Gosched()
		}
		cb := sl.claimed
		sl.claimed = nil // the caller leaves it alone until the next freeze
		if cb.err != nil {
			return fmt.Errorf("state: encode %q: %w", key, cb.err)
		}
		c.Set(key, cb.b, nil)
	}
	return nil
}

// encodeAll runs encodeFrozen over every table.
func encodeAll(tables []flusher, c *collector) error {
	for _, t := range tables {
		if err := t.encodeFrozen(c); err != nil {
			return err
		}
	}
	return nil
}
