package tallyward

import (
	"bytes"
	"crypto/rand"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"fmt"
	"math"
	"math/bits"
	"strings"

	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/sketch"
)

// Item hashes are what item kinds (Distinct, Frequency, TopShare) keep in
// place of items, inside the records of the entities that saw them. With
// an unkeyed hash, anyone holding the store and a list of candidate items
// (e-mail addresses, say) can test which ones occur, even after the
// entities named by those items were erased. So items are hashed with
// SipHash-2-4 (a keyed pseudorandom function made for short inputs, 64-bit
// output) under a 128-bit key of the store's own.
//
// The key is an identity of stored state, like a feature definition: two
// stores give the same rows only under the same key, so it is recorded
// under the definition name items/hash, in one of three forms:
//
//	xxh64                   no key: XXH64 seed 0 (package sketch), the hash
//	                        of stores made before keyed hashing, kept for
//	                        them so their rows do not change
//	siphash-2-4 key=<hex>   the key, drawn at random when the store was
//	                        made; snapshots carry it
//	siphash-2-4 check=<hex> the key came from Options.ItemKey and stays
//	                        outside the store; only the first 16 bytes of
//	                        SHA-256("tallyward item key" ‖ key) are kept,
//	                        to refuse a wrong key
type itemHashing struct {
	keyed    bool
	k0, k1   uint64
	key      []byte
	external bool
}

const (
	defItemHash    = "items/hash"
	defMaxDisorder = "pipeline/max-disorder"

	itemHashUnkeyed = "xxh64"
	itemHashKeyed   = "siphash-2-4 "
	// ItemKeySize is the length of Options.ItemKey.
	ItemKeySize = 16
)

func newItemHashing(key []byte, external bool) itemHashing {
	return itemHashing{keyed: true, key: bytes.Clone(key), external: external,
		k0: binary.LittleEndian.Uint64(key), k1: binary.LittleEndian.Uint64(key[8:])}
}

func (h *itemHashing) hash(s string) uint64 {
	if !h.keyed {
		return sketch.HashString(s)
	}
	return sipHash24(h.k0, h.k1, s)
}

func (h *itemHashing) describe() string {
	switch {
	case !h.keyed:
		return itemHashUnkeyed
	case h.external:
		return itemHashKeyed + "check=" + hex.EncodeToString(keyCheck(h.key))
	}
	return itemHashKeyed + "key=" + hex.EncodeToString(h.key)
}

func keyCheck(key []byte) []byte {
	sum := sha256.Sum256(append([]byte("tallyward item key"), key...))
	return sum[:16]
}

// chooseItemHashing decides how items are hashed from the stored
// definitions and Options.ItemKey / Options.UnkeyedItems.
func (p *Pipeline[E]) chooseItemHashing(stored map[string][]byte) error {
	o := &p.opts
	cur, has := stored[defItemHash]
	switch {
	case !has && len(stored) > 0, has && string(cur) == itemHashUnkeyed:
		if o.ItemKey != nil {
			return fmt.Errorf("%w: the store hashes items without a key and its records hold such hashes, so a key cannot be added to it: leave Options.ItemKey empty, or backfill a new store with it", ErrItemKey)
		}
		p.items = itemHashing{}
		if !o.UnkeyedItems {
			p.notices = append(p.notices, "items are hashed without a key (XXH64), as when this store was made, so its rows do not change; "+
				"anyone holding the store can test candidate items against the hashes item features keep: backfill a new store to key them")
		}
		return nil
	case has:
		if o.UnkeyedItems {
			return fmt.Errorf("%w: Options.UnkeyedItems is set but the store hashes items with a key", ErrItemKey)
		}
		rest, ok := strings.CutPrefix(string(cur), itemHashKeyed)
		if !ok {
			return fmt.Errorf("%w: definition %s is %q", store.ErrCorrupt, defItemHash, cur)
		}
		if hexKey, ok := strings.CutPrefix(rest, "key="); ok {
			key, err := hex.DecodeString(hexKey)
			if err != nil || len(key) != ItemKeySize {
				return fmt.Errorf("%w: definition %s holds a malformed key", store.ErrCorrupt, defItemHash)
			}
			if o.ItemKey != nil && !bytes.Equal(o.ItemKey, key) {
				return fmt.Errorf("%w: Options.ItemKey differs from the key the store was made with (leave it empty to use the stored one)", ErrItemKey)
			}
			p.items = newItemHashing(key, false)
			return nil
		}
		check, err := hex.DecodeString(strings.TrimPrefix(rest, "check="))
		if !strings.HasPrefix(rest, "check=") || err != nil {
			return fmt.Errorf("%w: definition %s is %q", store.ErrCorrupt, defItemHash, cur)
		}
		switch {
		case o.ItemKey == nil:
			return fmt.Errorf("%w: the store's items are hashed with a key kept outside it: set Options.ItemKey", ErrItemKey)
		case !bytes.Equal(keyCheck(o.ItemKey), check):
			return fmt.Errorf("%w: Options.ItemKey is not the key the store was made with", ErrItemKey)
		}
		p.items = newItemHashing(o.ItemKey, true)
		return nil
	case o.UnkeyedItems:
		p.items = itemHashing{}
	case o.ItemKey != nil:
		p.items = newItemHashing(o.ItemKey, true)
	default:
		key := make([]byte, ItemKeySize)
		rand.Read(key)
		p.items = newItemHashing(key, false)
	}
	return nil
}

// ItemKey returns the key items are hashed with (nil when they are hashed
// without one). Pass it as Options.ItemKey to another store that must give
// the same rows, such as a backfill compared with this one. Treat it as a
// secret: with it, the store's item hashes can be tested against
// candidate items.
func (p *Pipeline[E]) ItemKey() []byte { return bytes.Clone(p.items.key) }

// sipHash24 is SipHash-2-4 of s under the key (k0, k1), after Aumasson and
// Bernstein, "SipHash: a fast short-input PRF" (2012).
func sipHash24(k0, k1 uint64, s string) uint64 {
	v0 := k0 ^ 0x736f6d6570736575
	v1 := k1 ^ 0x646f72616e646f6d
	v2 := k0 ^ 0x6c7967656e657261
	v3 := k1 ^ 0x7465646279746573
	n := len(s)
	for ; len(s) >= 8; s = s[8:] {
		m := uint64(s[0]) | uint64(s[1])<<8 | uint64(s[2])<<16 | uint64(s[3])<<24 |
			uint64(s[4])<<32 | uint64(s[5])<<40 | uint64(s[6])<<48 | uint64(s[7])<<56
		v3 ^= m
		v0, v1, v2, v3 = sipRound(v0, v1, v2, v3)
		v0, v1, v2, v3 = sipRound(v0, v1, v2, v3)
		v0 ^= m
	}
	m := uint64(n) << 56
	for i := len(s) - 1; i >= 0; i-- {
		m |= uint64(s[i]) << (8 * i)
	}
	v3 ^= m
	v0, v1, v2, v3 = sipRound(v0, v1, v2, v3)
	v0, v1, v2, v3 = sipRound(v0, v1, v2, v3)
	v0 ^= m
	v2 ^= 0xff
	for range 4 {
		v0, v1, v2, v3 = sipRound(v0, v1, v2, v3)
	}
	return v0 ^ v1 ^ v2 ^ v3
}

func sipRound(v0, v1, v2, v3 uint64) (uint64, uint64, uint64, uint64) {
	v0 += v1
	v1 = bits.RotateLeft64(v1, 13)
	v1 ^= v0
	v0 = bits.RotateLeft64(v0, 32)
	v2 += v3
	v3 = bits.RotateLeft64(v3, 16)
	v3 ^= v2
	v0 += v3
	v3 = bits.RotateLeft64(v3, 21)
	v3 ^= v0
	v2 += v1
	v1 = bits.RotateLeft64(v1, 17)
	v1 ^= v2
	v2 = bits.RotateLeft64(v2, 32)
	return v0, v1, v2, v3
}

const (
	fnvOffset = 14695981039346656037
	fnvPrime  = 1099511628211
)

func fnv1a(h uint64, s string) uint64 {
	for i := 0; i < len(s); i++ {
		h ^= uint64(s[i])
		h *= fnvPrime
	}
	return h
}

// fnvFold folds v into the running tie-break hash h: an FNV-style multiply
// with a shift, not a finaliser (the sketch package's mix64 is one).
func fnvFold(h, v uint64) uint64 {
	h ^= v
	h *= fnvPrime
	h ^= h >> 29
	return h
}

// tieBreak hashes the event's extracted inputs. Events at one time are
// applied in tie-break order in Settled mode; as the hash depends only on
// what the event contributes to state, the order is free of arrival order.
// items are the features' unkeyed item hashes (see tieItemHashes), so the
// order is also the same in every store.
func (in *inputs) tieBreak(items []uint64) uint64 {
	h := uint64(fnvOffset)
	for _, k := range in.keys {
		h = fnv1a(h, k)
		h = fnvFold(h, uint64(len(k)))
	}
	for i, on := range in.on {
		if !on {
			h = fnvFold(h, 0)
			continue
		}
		h = fnvFold(h, 1)
		h = fnvFold(h, math.Float64bits(in.v[i]))
		h = fnvFold(h, items[i])
	}
	return h
}
