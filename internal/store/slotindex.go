package store

import (
	"hash/maphash"
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
)

// slotIndex finds a table's cached slots by key. It is a hash table with
// linear probing whose entries are one uint64 each: the upper 32 bits of
// the key's hash (the tag, which also chooses the entry's home), and the
// slot's position in Table.slots plus one (0: an empty entry). A Go map
// from key to slot costs 40–57 bytes per key after it grew (a 16-byte key
// and an 8-byte pointer per entry, at most 7/8 full) and holds two
// pointers per key for the GC to scan; these entries cost 11–21 bytes
// and hold none. A lookup whose tag matches reads the slot to compare the
// key, as the map reads the key's bytes.
//
// Deletion shifts the entries after it back (no deleted markers), and
// resizing moves entries by their tags without reading any key, so the
// index never pauses to rehash its keys: growing or shrinking it is one
// pass over its entries, and it happens only when the number of keys
// doubles or falls to an eighth.
//
// The caller keeps positions in step: every slot in Table.slots is in the
// index under its position, and a slot that moves in Table.slots is moved
// here (move).
type slotIndex struct {
	seed    maphash.Seed // the table's own: PartOf's hash already chose the part
	ents    []uint64     // len is a power of two, or 0
	n       int          // entries in use
	tagMask uint64       // idxMask; tests narrow it to crowd the index
}

const (
	idxBits = 32
	idxMask = 1<<idxBits - 1
	// minIndexLen is the smallest index; positions are below idxMask (a
	// table holding 4 billion slots has run out of memory long before).
	minIndexLen = 16
)

func newSlotIndex() slotIndex { return slotIndex{seed: maphash.MakeSeed(), tagMask: idxMask} }

func (x *slotIndex) tag(key string) uint64 {
	return maphash.String(x.seed, key) >> idxBits & x.tagMask
}

// getSlot returns the slot of key among slots (the table's), nil if the
// index holds none.
func getSlot[V Value](x *slotIndex, slots []*Slot[V], key string) *Slot[V] {
	if x.n == 0 {
		return nil
	}
	tag := x.tag(key)
	mask := uint64(len(x.ents) - 1)
	for i := tag & mask; ; i = (i + 1) & mask {
		e := x.ents[i]
		if e == 0 {
			return nil
		}
		if e>>idxBits == tag {
			if sl := slots[e&idxMask-1]; sl.Key == key {
				return sl
			}
		}
	}
}

// getSlotBytes is getSlot for a key held in bytes, without copying them.
func getSlotBytes[V Value](x *slotIndex, slots []*Slot[V], key []byte) *Slot[V] {
	return getSlot(x, slots, unsafe.String(unsafe.SliceData(key), len(key)))
}

// add enters key, absent from the index, at position pos.
func (x *slotIndex) add(key string, pos int) {
	if (x.n+1)*4 > len(x.ents)*3 {
		x.resize(x.n + 1)
	}
	x.put(x.tag(key), pos)
	x.n++
}

// put writes an entry for tag at pos into the first empty entry from its
// home on.
func (x *slotIndex) put(tag uint64, pos int) {
	mask := uint64(len(x.ents) - 1)
	i := tag & mask
	for x.ents[i] != 0 {
		i = (i + 1) & mask
	}
	x.ents[i] = tag<<idxBits | uint64(pos+1)
}

// find returns where key's entry for position pos is.
func (x *slotIndex) find(key string, pos int) uint64 {
	want := x.tag(key)<<idxBits | uint64(pos+1)
	mask := uint64(len(x.ents) - 1)
	for i := want >> idxBits & mask; ; i = (i + 1) & mask {
		switch x.ents[i] {
		case want:
			return i
		case 0:
			panic("store: slot index lost a key") // the caller broke the invariant
		}
	}
}

// remove deletes key's entry for position pos, shifting back the entries
// after it that would no longer be found from their homes, and shrinks
// the index once it is less than an eighth full.
func (x *slotIndex) remove(key string, pos int) {
	mask := uint64(len(x.ents) - 1)
	i := x.find(key, pos)
	for j := (i + 1) & mask; x.ents[j] != 0; j = (j + 1) & mask {
		home := x.ents[j] >> idxBits & mask
		// The entry at j stays if its home lies cyclically in (i, j]: a
		// probe from there reaches j without passing i.
		stays := home > i && home <= j
		if j < i {
			stays = home > i || home <= j
		}
		if !stays {
			x.ents[i] = x.ents[j]
			i = j
		}
	}
	x.ents[i] = 0
	x.n--
	if len(x.ents) > minIndexLen && x.n*8 < len(x.ents) {
		x.resize(x.n)
	}
}

// move records that key's slot moved from position from to position to.
func (x *slotIndex) move(key string, from, to int) {
	i := x.find(key, from)
	x.ents[i] = x.ents[i]>>idxBits<<idxBits | uint64(to+1)
}

// resize makes the index the smallest that holds n keys at most half full
// (at least minIndexLen entries) and moves the entries over by their tags.
func (x *slotIndex) resize(n int) {
	size := minIndexLen
	for size < 2*n {
		size *= 2
	}
	old := x.ents
	x.ents = make([]uint64, size)
	for _, e := range old {
		if e != 0 {
			x.put(e>>idxBits, int(e&idxMask)-1)
		}
	}
}

// Hints for a run of lookups. A caller that knows which keys it will Get
// next can have their misses overlap: for each key, in this order and
// some work apart, HintIndex (the index entry), HintPos (the slot's place
// in Table.slots) and HintSlot (the slot); then it may hint the slot's
// key and value itself. Each step reads only what the step before
// brought in. The hints change nothing: a slot moved, evicted or
// dropped in between makes a hint useless, not wrong. Like Get, they are
// for the goroutine that owns the table (its part).

// HintIndex starts bringing in the index entry of key and returns its tag
// for HintPos.
func (t *Table[V]) HintIndex(key string) uint64 {
	x := &t.index
	tag := x.tag(key)
	if len(x.ents) > 0 {
		prefetch.Line(unsafe.Pointer(&x.ents[tag&uint64(len(x.ents)-1)]))
	}
	return tag
}

// HintPos finds the first index entry for tag and starts bringing in its
// place in Table.slots; it returns that position plus one, 0 if none.
func (t *Table[V]) HintPos(tag uint64) int {
	x := &t.index
	if x.n == 0 {
		return 0
	}
	mask := uint64(len(x.ents) - 1)
	for i := tag & mask; ; i = (i + 1) & mask {
		e := x.ents[i]
		if e == 0 {
			return 0
		}
		if e>>idxBits == tag {
			pos := int(e & idxMask)
			if pos > len(t.slots) {
				return 0
			}
			prefetch.Line(unsafe.Pointer(&t.slots[pos-1]))
			return pos
		}
	}
}

// HintSlot starts bringing in the slot at position pos-1 (from HintPos)
// and returns it, nil if there is none.
func (t *Table[V]) HintSlot(pos int) *Slot[V] {
	if pos <= 0 || pos > len(t.slots) {
		return nil
	}
	sl := t.slots[pos-1]
	prefetch.Line(unsafe.Pointer(sl))
	return sl
}

// HintChain walks one key's chain of misses, a step per call to Step, so
// that the caller can interleave several keys' chains with its work: the
// workers' lookahead and dropSwept use it.
type HintChain[V Value] struct {
	tag  uint64
	pos  int
	slot *Slot[V]
}

// HintSteps is the length of a HintChain: index entry, slot position,
// slot, then key and value.
const HintSteps = 4

// Step takes step i (0 <= i < HintSteps) of key's chain in t; each reads
// only what the step before brought in. The last step hints the slot's
// key and value (HintValue) and returns the slot, nil if there is none.
func (c *HintChain[V]) Step(t *Table[V], i int, key string) *Slot[V] {
	switch i {
	case 0:
		c.tag = t.HintIndex(key)
	case 1:
		c.pos = t.HintPos(c.tag)
	case 2:
		c.slot = t.HintSlot(c.pos)
	case 3:
		sl := c.slot
		c.slot = nil
		if sl != nil {
			t.hintContents(sl)
		}
		return sl
	}
	return nil
}

// hintContents starts bringing sl's key and value (HintValue) into the
// processor's caches.
func (t *Table[V]) hintContents(sl *Slot[V]) {
	prefetch.Line(unsafe.Pointer(unsafe.StringData(sl.Key)))
	if t.HintValue != nil {
		t.HintValue(sl.Value)
	}
}

// Readable reports whether the caller may read sl's value now without
// claiming it (see claim): false only while the commit in flight may be
// encoding it, which a hint, reading a record to find what it holds
// outside itself, must not wait for or race with.
func (t *Table[V]) Readable(sl *Slot[V]) bool {
	f := t.store.flightGen
	return sl.dirtyIn != f || sl.hand.Load() == handDone(f)
}
