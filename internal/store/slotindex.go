package store

import (
	"hash/maphash"
	"unsafe"
)

// slotIndex finds a table's cached slots by key. It is a hash table with
// linear probing whose entries are one uint64 each: the upper 32 bits of
// the key's hash, and the slot's position in Table.slots plus one (0: an
// empty entry, tombIdx: a deleted one). A Go map from key to slot costs
// 40–57 bytes per key after it grew (a 16-byte key and an 8-byte pointer
// per entry, at most 7/8 full) and holds two pointers per key for the GC
// to scan; these entries cost 11–21 bytes and hold none. A lookup whose
// hash bits match reads the slot to compare the key, as the map reads
// the key's bytes.
//
// The caller keeps positions in step: every slot in Table.slots is in the
// index under its position, and a slot that moves in Table.slots is moved
// here (move).
type slotIndex struct {
	seed  maphash.Seed // the table's own: PartOf's hash already chose the part
	ents  []uint64     // len is a power of two, or 0
	n     int          // live entries
	tombs int          // deleted entries
}

const (
	idxBits = 32
	idxMask = 1<<idxBits - 1
	tombIdx = idxMask // low bits of a deleted entry
	// Positions are below tombIdx-1; a table holding 4 billion slots has
	// run out of memory long before.
	minIndexLen = 16
)

func newSlotIndex() slotIndex { return slotIndex{seed: maphash.MakeSeed()} }

func (x *slotIndex) hash(key string) uint64 { return maphash.String(x.seed, key) }

// getSlot returns the slot of key among slots (the table's), nil if the
// index holds none.
func getSlot[V Value](x *slotIndex, slots []*Slot[V], key string) *Slot[V] {
	if x.n == 0 {
		return nil
	}
	h := x.hash(key)
	tag := h >> idxBits
	mask := uint64(len(x.ents) - 1)
	for i := h & mask; ; i = (i + 1) & mask {
		e := x.ents[i]
		if e == 0 {
			return nil
		}
		if e>>idxBits == tag && e&idxMask != tombIdx {
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

// add enters key, absent from the index, at position pos. slots must hold
// every slot the index holds (it is read only to rebuild the index).
func addSlot[V Value](x *slotIndex, slots []*Slot[V], key string, pos int) {
	if (x.n+x.tombs+1)*4 > len(x.ents)*3 {
		rebuildSlots(x, slots, x.n+1)
	}
	x.put(x.hash(key), pos)
	x.n++
}

// put writes an entry for hash h at pos into the first free entry of its
// probe sequence. Deleted entries are not reused: a lookup stops only at
// an empty one, and reusing would need a full probe to rule out a copy.
func (x *slotIndex) put(h uint64, pos int) {
	mask := uint64(len(x.ents) - 1)
	i := h & mask
	for x.ents[i] != 0 {
		i = (i + 1) & mask
	}
	x.ents[i] = h>>idxBits<<idxBits | uint64(pos+1)
}

// find returns the entry index of key's entry at position pos.
func (x *slotIndex) find(key string, pos int) uint64 {
	h := x.hash(key)
	tag := h >> idxBits
	mask := uint64(len(x.ents) - 1)
	for i := h & mask; ; i = (i + 1) & mask {
		e := x.ents[i]
		if e == 0 {
			panic("store: slot index lost a key") // the caller broke the invariant
		}
		if e>>idxBits == tag && e&idxMask == uint64(pos+1) {
			return i
		}
	}
}

// remove deletes key's entry at position pos.
func (x *slotIndex) remove(key string, pos int) {
	i := x.find(key, pos)
	x.ents[i] = x.ents[i]>>idxBits<<idxBits | tombIdx
	x.n--
	x.tombs++
	if x.n == 0 {
		clear(x.ents)
		x.tombs = 0
	}
}

// move records that key's slot moved from position from to position to.
func (x *slotIndex) move(key string, from, to int) {
	i := x.find(key, from)
	x.ents[i] = x.ents[i]>>idxBits<<idxBits | uint64(to+1)
}

// rebuildSlots sizes the index for n keys (at most half full, at least
// minIndexLen entries) and enters every slot of slots, dropping deleted
// entries. It also shrinks an index that emptied out.
func rebuildSlots[V Value](x *slotIndex, slots []*Slot[V], n int) {
	size := minIndexLen
	for size < 2*n {
		size *= 2
	}
	if size == len(x.ents) {
		clear(x.ents)
	} else {
		x.ents = make([]uint64, size)
	}
	x.tombs = 0
	for pos, sl := range slots {
		x.put(x.hash(sl.Key), pos)
	}
}

// shrinkSlots rebuilds the index smaller once it is less than an eighth
// full, so that a table that gave back most of its slots gives back its
// index too.
func shrinkSlots[V Value](x *slotIndex, slots []*Slot[V]) {
	if len(x.ents) > minIndexLen && x.n*8 < len(x.ents) {
		rebuildSlots(x, slots, x.n)
	}
}
