package tallyward

import (
	"math"

	"github.com/tallyward/tallyward/sketch"
)

// hashItem maps an item to the 64-bit hash that item kinds consume: the
// sketch package's fixed hash, which its formats are versioned with.
func hashItem(s string) uint64 { return sketch.HashString(s) }

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
func (in *inputs) tieBreak() uint64 {
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
		h = fnvFold(h, in.item[i])
	}
	return h
}
