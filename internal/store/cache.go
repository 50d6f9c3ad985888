package store

import (
	"fmt"
	"math"
	"slices"
	"sync/atomic"

	"github.com/tallyward/tallyward/internal/sat"
)

// Value is what a Table caches: a decoded record that can encode itself,
// estimate its own memory and tell the newest event time applied to it
// (which drives expiry).
type Value interface {
	AppendBinary(dst []byte) ([]byte, error)
	SizeBytes() int
	LastTime() int64
}

// budget is the byte bound shared by all tables of one store.
//
// Invariant: used == sum of Slot.size over every slot in every table, plus
// the sizes of the values tables keep for Reuse.
type budget struct {
	used  atomic.Int64 // parts of a table add to it concurrently
	limit int64
}

// Slot is one cached entry. Callers mutate Value in place and then call
// Table.Touch so the change is committed and its size accounted.
//
// Fields are ordered and sized so a slot is 64 bytes (one per cached
// entity; 80 with int-sized fields).
type Slot[V Value] struct {
	Key   string
	Value V

	indexed int64 // expiry bucket of this key's stored index entry; 0 = none
	// dirtyIn is the generation (Store.gen) in which the slot was last
	// changed: dirty while it equals the store's, 0 when clean or staged.
	dirtyIn uint64
	// Handing the value to a commit in flight (see handoff.go).
	claimed *claimedBytes
	hand    atomic.Int32

	size    int32 // bytes counted against the budget
	idx     int32 // position in Table.slots
	evicted bool
	ref     bool // used since the clock hand last passed
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
	ttl    int64 // 0: records never expire

	// knownAbsent: the table held no record when it was opened and no
	// record has since left the cache except by deletion, so a key not in
	// the cache is in no batch and not in Pebble either. A replay into a
	// new store with a cache that holds its working set then never reads
	// Pebble for a new entity.
	knownAbsent bool

	// PeekLast, if set, reads a stored record's newest time without
	// decoding it all; the expiry sweep uses it.
	PeekLast func(b []byte) (int64, error)

	// HintValue, if set, starts bringing a value's memory into the
	// processor's caches without reading it (package prefetch): the
	// commit's goroutine calls it a few records before encoding one.
	HintValue func(v V)

	// parts lists every part of a split table (see parts.go), this one
	// included; nil when the table is not split.
	parts []*Table[V]
	part  int // t's index in parts

	index  slotIndex  // finds slots by key (slotindex.go)
	slots  []*Slot[V] // every cached slot; Invariant: slots[i].idx == i
	hand   int        // clock hand into slots
	dirty  []*Slot[V] // slots made dirty since the last commit (may hold evicted ones)
	free   []kept[V]  // values of expired slots, for Reuse (see recycle)
	frozen []*Slot[V] // the dirty list of the commit in flight; owned by it while in flight
	dropQ  []string   // entities landed commits removed, to drop (see queueSwept)
	// dropDue counts the drops Touch owes since it last called dropSwept.
	dropDue int
	keybuf  []byte
	valbuf  []byte

	hits, misses, evictions uint64
}

// NewTable registers a cache over the records of table name in s. decode
// turns stored bytes into a value; its error is reported with the key.
//
// ttl > 0 makes records expire once idle that long (see Store.Commit); 0
// keeps them forever. The ttl must be the one the store's expiry index was
// built with: a caller that changes it calls RebuildExpiry first.
func NewTable[V Value](s *Store, name string, ttl int64, decode func(b []byte) (V, error)) *Table[V] {
	t := &Table[V]{store: s, name: name, decode: decode, ttl: ttl, index: newSlotIndex()}
	s.tables = append(s.tables, t)
	t.knownAbsent = s.empty(RecordKey(nil, name, ""))
	return t
}

// load reads key from the store without caching it. fresh reports a
// record written since the last cut, which no commit has judged yet.
func (t *Table[V]) load(key string) (v V, found, fresh bool, err error) {
	t.keybuf = RecordKey(t.keybuf[:0], t.name, key)
	found, fresh, err = t.store.getRecord(t.keybuf, func(b []byte) error {
		var derr error
		v, derr = t.decode(b)
		if derr != nil {
			return fmt.Errorf("%w: %w", ErrCorrupt, derr)
		}
		return nil
	})
	return v, found, fresh, err
}

// lookup returns the cached slot of key, nil if none.
func (t *Table[V]) lookup(key string) *Slot[V] { return getSlot(&t.index, t.slots, key) }

// Name returns the table name.
func (t *Table[V]) Name() string { return t.name }

// Get returns the slot of key, loading it from the store on a miss. It
// returns nil, nil when the key is stored nowhere, or when a commit
// removed its record as expired (see sweepflight.go: a cached slot of such
// a record is dropped here). A hit is served from memory even after the
// store failed; the failure surfaces at the next miss, Commit or Sweep.
func (t *Table[V]) Get(key string) (*Slot[V], error) {
	if sl := t.lookup(key); sl != nil {
		t.hits++
		sl.ref = true
		if sl.dirtyIn == t.store.flightGen && sl.dirtyIn != 0 {
			t.claim(sl)
		}
		if sl.dirtyIn != t.store.gen && t.sweptAway(sl.indexed) {
			sl.dirtyIn = 0
			t.recycle(sl)
			return nil, nil
		}
		return sl, nil
	}
	if err := t.store.check(); err != nil {
		return nil, err
	}
	t.misses++
	if t.knownAbsent {
		return nil, nil
	}
	v, found, fresh, err := t.load(key)
	if err != nil || !found {
		return nil, err
	}
	b := t.bucket(v.LastTime())
	if !fresh && t.sweptAway(b) {
		return nil, nil
	}
	sl := &Slot[V]{Key: key, Value: v, indexed: b}
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

// Touch marks sl dirty, re-measures it and evicts entries (never sl, by
// CLOCK) while the store is over its byte budget. sl must be a slot this
// table returned and has not since evicted or deleted: slots are only
// valid until the next call that can evict.
func (t *Table[V]) Touch(sl *Slot[V]) {
	t.markDirty(sl)
	if len(t.dropQ) > 0 {
		// Two per Touch, a chunk at a time (see dropSwept).
		if t.dropDue += 2; t.dropDue >= dropChunk || t.dropDue >= len(t.dropQ) {
			t.dropSwept(t.dropDue)
			t.dropDue = 0
		}
	}
	t.resize(sl)
}

// markDirty adds sl to the dirty list unless it is on it.
func (t *Table[V]) markDirty(sl *Slot[V]) {
	if sl.dirtyIn != t.store.gen {
		sl.dirtyIn = t.store.gen
		t.dirty = append(t.dirty, sl)
	}
}

// isDirty reports whether sl changed since the last commit was cut.
func (t *Table[V]) isDirty(sl *Slot[V]) bool { return sl.dirtyIn == t.store.gen }

func (t *Table[V]) resize(sl *Slot[V]) {
	n := min(sl.Value.SizeBytes()+len(sl.Key)+slotOverhead, math.MaxInt32)
	used := t.store.budget.used.Add(int64(n) - int64(sl.size))
	sl.size = int32(n)
	// Records evicted dirty wait in the pending batch and count against
	// the same budget: eviction makes room for them too, and past half
	// the budget OverBudget asks the caller to commit.
	for used+t.store.pendingBytes() > t.store.budget.limit && len(t.slots) > 1 {
		if len(t.free) > 0 {
			t.releaseFree()
			used = t.store.budget.used.Load()
			continue
		}
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
		used = t.store.budget.used.Load()
	}
}

// slotOverhead approximates the slot struct (64 bytes, the key's header
// included), its index entry (8 bytes in an index a half to three
// quarters full) and its place in Table.slots (8 bytes).
const slotOverhead = 88

// evict drops victim from memory, staging it in the pending batch first if
// it is dirty so that later reads and the next commit still see it.
func (t *Table[V]) evict(victim *Slot[V]) error {
	inFlight := victim.dirtyIn == t.store.flightGen && victim.dirtyIn != 0
	if inFlight {
		t.claim(victim)
		// One the commit deletes stays deleted: reads judge the stored
		// record swept away.
		inFlight = !t.sweptAway(victim.indexed)
	}
	if t.isDirty(victim) || inFlight {
		if err := t.stage(staging{t.store}, victim); err != nil {
			return err
		}
		victim.dirtyIn = 0
	}
	t.knownAbsent = false
	t.drop(victim)
	t.evictions++
	// Dropped slots stay in t.dirty until the next commit; once they are
	// most of it, filter them out so that memory follows the budget.
	if len(t.dirty) > 1024 && len(t.dirty) > 2*len(t.slots) {
		t.dirty = slices.DeleteFunc(t.dirty, func(sl *Slot[V]) bool { return !t.isDirty(sl) })
	}
	return nil
}

// recycle drops sl, expired and removed by a sweep, and keeps its value
// for Reuse: a commit removes about as many expired records as new
// entities arrive before the next, and a record is an entity's largest
// allocation. Sweeps recycle (Store.Sweep, between events with no commit
// in flight), and so do Get and dropSwept for a record a commit removed:
// Get has reported such a record absent since the cut, so no caller
// holds it, and the commit's goroutine reads a slot only while it was
// frozen and its hand not done, which Get waits for (a slot evicted
// during an event may still be read by
// that event's answer, so eviction does not recycle). Kept values count
// against the budget until reused; over budget a part lets its own go
// before any cached entry (resize).
func (t *Table[V]) recycle(sl *Slot[V]) {
	v := sl.Value
	t.drop(sl)
	if len(t.free) >= len(t.slots)/32+64 {
		return
	}
	k := kept[V]{v, int64(v.SizeBytes())}
	t.free = append(t.free, k)
	t.store.budget.used.Add(k.size)
}

// kept is a value kept for Reuse and the bytes it counts in the budget.
type kept[V Value] struct {
	v    V
	size int64
}

// Reuse returns the value of a record a commit removed as expired, if one
// is kept, for the caller to make empty and Insert under another key. Its
// contents are the expired record's.
func (t *Table[V]) Reuse() (v V, ok bool) {
	n := len(t.free)
	if n == 0 {
		return v, false
	}
	k := t.free[n-1]
	t.free[n-1] = kept[V]{}
	t.free = t.free[:n-1]
	t.store.budget.used.Add(-k.size)
	return k.v, true
}

// releaseFree lets the values kept for Reuse go.
func (t *Table[V]) releaseFree() {
	for _, k := range t.free {
		t.store.budget.used.Add(-k.size)
	}
	clear(t.free)
	t.free = t.free[:0]
}

// drop removes sl from memory (not from the store).
func (t *Table[V]) drop(sl *Slot[V]) {
	sl.evicted = true
	t.index.remove(sl.Key, int(sl.idx))
	last := t.slots[len(t.slots)-1]
	if last != sl {
		t.index.move(last.Key, int(last.idx), int(sl.idx))
	}
	t.slots[sl.idx] = last
	last.idx = sl.idx
	t.slots[len(t.slots)-1] = nil
	t.slots = t.slots[:len(t.slots)-1]
	t.store.budget.used.Add(-int64(sl.size))
	sl.size = 0
	// The slot may stay referenced (t.dirty until the next commit, a
	// caller's variable); its value must not.
	var zero V
	sl.Value = zero
}

// stage writes sl's record, and moves its expiry index entry if its
// bucket changed, into b.
func (t *Table[V]) stage(b writer, sl *Slot[V]) error {
	var err error
	t.keybuf = RecordKey(t.keybuf[:0], t.name, sl.Key)
	t.valbuf, err = sl.Value.AppendBinary(t.valbuf[:0])
	if err != nil {
		return fmt.Errorf("state: encode %q: %w", t.keybuf, err)
	}
	if err := b.Set(t.keybuf, t.valbuf, nil); err != nil {
		return err
	}
	return t.moveIndex(b, sl)
}

// moveIndex moves sl's expiry index entry, in b, if its bucket changed.
func (t *Table[V]) moveIndex(b writer, sl *Slot[V]) error {
	if nb := t.bucket(sl.Value.LastTime()); nb != sl.indexed {
		if sl.indexed != 0 {
			t.keybuf = expiryKey(t.keybuf[:0], sl.indexed, t.name, sl.Key)
			if err := b.Delete(t.keybuf, nil); err != nil {
				return err
			}
		}
		t.keybuf = expiryKey(t.keybuf[:0], nb, t.name, sl.Key)
		if err := b.Set(t.keybuf, nil, nil); err != nil {
			return err
		}
		sl.indexed = nb
	}
	return nil
}

// bucket is the expiry index time of a record last updated at last: its
// expiry time rounded up to a multiple of ttl/16, so that a busy entity
// moves its index entry about sixteen times per ttl, not on every commit.
// 0 when records never expire.
func (t *Table[V]) bucket(last int64) int64 {
	if t.ttl <= 0 {
		return 0
	}
	g := max(t.ttl/16, 1)
	exp := sat.Add(last, t.ttl)
	b := exp / g * g
	if b < exp {
		b = sat.Add(b, g)
	}
	if b == 0 {
		b = g
	}
	return b
}

// Delete removes key's record and expiry index entry from the cache and
// stages their deletion for the next commit. It reports whether a record
// existed.
func (t *Table[V]) Delete(key string) (bool, error) {
	if err := t.store.check(); err != nil {
		return false, err
	}
	sl, err := t.Get(key)
	if err != nil || sl == nil {
		return false, err
	}
	sl.dirtyIn = 0
	t.drop(sl)
	b := staging{t.store}
	if sl.indexed != 0 {
		t.keybuf = expiryKey(t.keybuf[:0], sl.indexed, t.name, key)
		if err := b.Delete(t.keybuf, nil); err != nil {
			return true, t.store.fail(err)
		}
	}
	t.keybuf = RecordKey(t.keybuf[:0], t.name, key)
	if err := b.Delete(t.keybuf, nil); err != nil {
		return true, t.store.fail(err)
	}
	return true, nil
}

// Len returns the number of cached entries.
func (t *Table[V]) Len() int { return t.index.n }

// CacheStats returns hit, miss and eviction counts since the table was made.
func (t *Table[V]) CacheStats() (hits, misses, evictions uint64) {
	return t.hits, t.misses, t.evictions
}

func (t *Table[V]) link(sl *Slot[V]) {
	t.index.add(sl.Key, len(t.slots))
	sl.idx = int32(len(t.slots))
	sl.ref = true
	t.slots = append(t.slots, sl)
}
