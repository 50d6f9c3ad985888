package store

import "hash/maphash"

// A table may be split into parts so that several goroutines can work on
// its records at once. Part i of n caches the keys with PartOf(key, n) ==
// i; each part has its own map, slots, clock hand and dirty list, so its
// hits take no lock. The parts of a store share:
//
//   - the byte budget (an atomic sum; a part evicts its own slots when
//     the sum is over it, so one busy part can push out another's),
//   - the spill and pending batch that evictions stage into, under
//     Store.stageMu, and the sticky error, under Store.errMu,
//   - Pebble itself, which serves concurrent reads.
//
// The concurrency rule: between two calls of anything else on the Store
// or its tables (Commit, CommitAsync, Settle, Sweep, Delete, Rewrite,
// RebuildExpiry, SetTombstone, Snapshot, Close), each part may be used
// by one goroutine (Get, Insert, Touch, Len, CacheStats), different parts
// by different goroutines. Those other calls need every part idle; the
// caller orders them with its parts' goroutines (a barrier). A commit
// then takes every part's dirty records at one point, so a crash still
// exposes one cut of the whole store.

// partSeed is fixed for the process: which part caches a key is a
// property of the process, not of the store (records are stored by key
// alone), so any seed will do as long as every caller shares it.
var partSeed = maphash.MakeSeed()

// PartOf returns the part, of n, that caches key.
func PartOf(key string, n int) int {
	if n <= 1 {
		return 0
	}
	return int(maphash.String(partSeed, key) % uint64(n))
}

// NewParts registers a table of name split into n parts (n >= 1), all
// over the same records, and returns them in part order. With n == 1 it
// is NewTable. peekLast, if not nil, is set as every part's PeekLast.
func NewParts[V Value](s *Store, name string, ttl int64, decode func(b []byte) (V, error), n int, peekLast func(b []byte) (int64, error)) []*Table[V] {
	parts := make([]*Table[V], max(n, 1))
	for i := range parts {
		t := NewTable(s, name, ttl, decode)
		t.PeekLast = peekLast
		t.parts = parts
		t.part = i
		parts[i] = t
	}
	return parts
}

// owner returns the part of t's table that caches key (t itself when the
// table is not split).
func (t *Table[V]) owner(key string) *Table[V] {
	if len(t.parts) <= 1 {
		return t
	}
	return t.parts[PartOf(key, len(t.parts))]
}

// group returns every part of t's table.
func (t *Table[V]) group() []*Table[V] {
	if len(t.parts) == 0 {
		return []*Table[V]{t}
	}
	return t.parts
}
