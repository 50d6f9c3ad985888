package state

import (
	"fmt"

	"github.com/cockroachdb/pebble/v2"
)

// Value is what a Table caches: a decoded record that can encode itself and
// estimate its own memory.
type Value interface {
	AppendBinary(dst []byte) ([]byte, error)
	SizeBytes() int
}

// budget is the byte bound shared by all tables of one store.
//
// Invariant: used == sum of Slot.size over every slot in every table.
type budget struct {
	used  int64
	limit int64
}

// Slot is one cached entry. Callers mutate Value in place and then call
// Table.Touch so the change is committed and its size accounted.
type Slot[V Value] struct {
	Key   string
	Value V

	size    int
	dirty   bool
	evicted bool
	ref     bool // used since the clock hand last passed
	idx     int  // position in Table.slots
}

// Table is a write-back cache of one kind of record (one key space under a
// table name). Gets on a hit cost a map lookup and no allocation; misses
// read Pebble and decode once.
//
// Eviction is CLOCK (second chance): a hit only sets a bit in the slot it
// already loaded, where an LRU list would also write two neighbouring
// slots, each likely a cache miss on a large table.
type Table[V Value] struct {
	store  *Store
	name   string
	decode func(b []byte) (V, error)

	m      map[string]*Slot[V]
	slots  []*Slot[V] // every cached slot; Invariant: slots[i].idx == i
	hand   int        // clock hand into slots
	dirty  []*Slot[V] // slots made dirty since the last commit (may hold evicted ones)
	keybuf []byte
	valbuf []byte

	hits, misses, evictions uint64
}

// NewTable registers a cache over the records of table name in s. decode
// turns stored bytes into a value; its error is reported with the key.
func NewTable[V Value](s *Store, name string, decode func(b []byte) (V, error)) *Table[V] {
	t := &Table[V]{store: s, name: name, decode: decode, m: map[string]*Slot[V]{}}
	s.tables = append(s.tables, t)
	return t
}

// Name returns the table name.
func (t *Table[V]) Name() string { return t.name }

// Get returns the slot of key, loading it from the store on a miss. It
// returns nil, nil when the key is stored nowhere.
func (t *Table[V]) Get(key string) (*Slot[V], error) {
	if sl := t.m[key]; sl != nil {
		t.hits++
		sl.ref = true
		return sl, nil
	}
	if err := t.store.check(); err != nil {
		return nil, err
	}
	t.misses++
	t.keybuf = RecordKey(t.keybuf[:0], t.name, key)
	var v V
	found, err := t.store.getRaw(t.keybuf, func(b []byte) error {
		var derr error
		v, derr = t.decode(b)
		if derr != nil {
			return fmt.Errorf("%w: %w", ErrCorrupt, derr)
		}
		return nil
	})
	if err != nil || !found {
		return nil, err
	}
	sl := &Slot[V]{Key: key, Value: v}
	t.link(sl)
	t.resize(sl)
	return sl, nil
}

// Insert adds a new entry for key (which must not be cached) and marks it
// dirty.
func (t *Table[V]) Insert(key string, v V) *Slot[V] {
	sl := &Slot[V]{Key: key, Value: v}
	t.link(sl)
	t.Touch(sl)
	return sl
}

// Touch marks sl dirty, re-measures it and evicts least recently used
// entries (never sl) while the store is over its byte budget.
func (t *Table[V]) Touch(sl *Slot[V]) {
	if !sl.dirty {
		sl.dirty = true
		t.dirty = append(t.dirty, sl)
	}
	t.resize(sl)
}

func (t *Table[V]) resize(sl *Slot[V]) {
	n := sl.Value.SizeBytes() + len(sl.Key) + slotOverhead
	t.store.budget.used += int64(n - sl.size)
	sl.size = n
	for t.store.budget.used > t.store.budget.limit && len(t.slots) > 1 {
		if t.hand >= len(t.slots) {
			t.hand = 0
		}
		victim := t.slots[t.hand]
		if victim.ref || victim == sl {
			victim.ref = false
			t.hand++
			continue
		}
		if err := t.evict(victim); err != nil {
			t.store.fail(err)
			return
		}
	}
}

// slotOverhead approximates the map entry, slot struct and key header.
const slotOverhead = 96

// evict drops victim from memory, staging it in the pending batch first if
// it is dirty so that later reads and the next commit still see it.
func (t *Table[V]) evict(victim *Slot[V]) error {
	if victim.dirty {
		if err := t.stage(t.store.pending, victim); err != nil {
			return err
		}
		victim.dirty = false
	}
	t.drop(victim)
	t.evictions++
	return nil
}

// drop removes sl from memory (not from the store).
func (t *Table[V]) drop(sl *Slot[V]) {
	sl.evicted = true
	last := t.slots[len(t.slots)-1]
	t.slots[sl.idx] = last
	last.idx = sl.idx
	t.slots[len(t.slots)-1] = nil
	t.slots = t.slots[:len(t.slots)-1]
	delete(t.m, sl.Key)
	t.store.budget.used -= int64(sl.size)
	sl.size = 0
}

func (t *Table[V]) stage(b *pebble.Batch, sl *Slot[V]) error {
	var err error
	t.keybuf = RecordKey(t.keybuf[:0], t.name, sl.Key)
	t.valbuf, err = sl.Value.AppendBinary(t.valbuf[:0])
	if err != nil {
		return fmt.Errorf("state: encode %q: %w", t.keybuf, err)
	}
	return b.Set(t.keybuf, t.valbuf, nil)
}

func (t *Table[V]) flushDirty(b *pebble.Batch) error {
	for _, sl := range t.dirty {
		if !sl.dirty {
			continue
		}
		if err := t.stage(b, sl); err != nil {
			return err
		}
		sl.dirty = false
	}
	clear(t.dirty)
	t.dirty = t.dirty[:0]
	return nil
}

// Delete removes key from the cache and stages its deletion.
func (t *Table[V]) Delete(key string) error {
	if err := t.store.check(); err != nil {
		return err
	}
	if sl := t.m[key]; sl != nil {
		sl.dirty = false
		t.drop(sl)
	}
	t.keybuf = RecordKey(t.keybuf[:0], t.name, key)
	if err := t.store.pending.Delete(t.keybuf, nil); err != nil {
		return t.store.fail(err)
	}
	return nil
}

// Len returns the number of cached entries.
func (t *Table[V]) Len() int { return len(t.m) }

// CacheStats returns hit, miss and eviction counts since the table was made.
func (t *Table[V]) CacheStats() (hits, misses, evictions uint64) {
	return t.hits, t.misses, t.evictions
}

func (t *Table[V]) link(sl *Slot[V]) {
	t.m[sl.Key] = sl
	sl.idx = len(t.slots)
	sl.ref = true
	t.slots = append(t.slots, sl)
}
