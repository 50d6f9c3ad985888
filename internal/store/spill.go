package store

import (
	"github.com/cockroachdb/pebble/v2"
)

// spill holds the record writes (tag 0x03) staged between commits: dirty
// records evicted from a cache and record deletions. It replaces the
// indexed batch for them: an indexed batch inserts every write into a
// skiplist and serves reads through it, and on a cache that churns those
// comparisons were a large share of all work. Here a write is one map
// assignment and a read one map lookup. Everything else staged
// (definitions, tombstones, expiry index entries, salt) stays in the
// pending batch, where iterators see it.
//
// Invariant: a record key is written to the pending batch only by
// Rewrite, after the spill was moved there (spillToPending), so the newest
// staged write of a record key is in the spill if it is anywhere in the
// spill, else in the pending batch.
type spill struct {
	m     map[string]spilled
	arena arena // keys and values
	bytes int64 // approximate memory, for the budget
}

// spillEntryBytes approximates a map entry's memory beside key and value.
const spillEntryBytes = 64

type spilled struct {
	val []byte
	del bool
}

const spillChunk = 1 << 20

func newSpill() *spill { return &spill{m: map[string]spilled{}} }

// reset empties sp for reuse, keeping its map's room and its last chunk.
func (sp *spill) reset() {
	clear(sp.m)
	sp.arena.reset()
	sp.bytes = 0
}

func (sp *spill) set(key, val []byte) {
	sp.m[sp.key(key)] = spilled{val: sp.keep(val)}
	sp.bytes += int64(len(key) + len(val) + spillEntryBytes)
}

func (sp *spill) delete(key []byte) {
	sp.m[sp.key(key)] = spilled{del: true}
	sp.bytes += int64(len(key) + spillEntryBytes)
}

// keep copies b into the spill's arena.
func (sp *spill) keep(b []byte) []byte { return sp.arena.keep(b) }

// arena hands out copies of byte slices from chunks that start small and
// double up to spillChunk, so a store that stages little holds little.
// A copy stays valid until reset, which keeps the last chunk for reuse:
// whoever holds copies (map keys that view them, say) must drop them
// first.
type arena struct{ buf []byte }

func (a *arena) keep(b []byte) []byte {
	if cap(a.buf)-len(a.buf) < len(b) {
		a.buf = make([]byte, 0, max(min(2*cap(a.buf), spillChunk), 4<<10, len(b)))
	}
	a.buf = append(a.buf, b...)
	return a.buf[len(a.buf)-len(b) : len(a.buf) : len(a.buf)]
}

func (a *arena) reset() { a.buf = a.buf[:0] }

// key returns a map key for key that shares a copy in the arena: a
// string allocated per staged write was a fifth of a pipeline's
// allocations. Arena bytes are not changed before reset, which clears the
// map first, so no key outlives its bytes.
func (sp *spill) key(key []byte) string { return viewString(sp.keep(key)) }

// get reports whether the spill holds key, and its value (nil if deleted).
func (sp *spill) get(key []byte) (v []byte, del, ok bool) {
	e, ok := sp.m[string(key)]
	return e.val, e.del, ok
}

// staging is the writer for everything a cache stages between commits:
// record keys go to the spill, the rest to the pending batch.
type staging struct{ s *Store }

func (w staging) Set(key, value []byte, _ *pebble.WriteOptions) error {
	w.s.stageMu.Lock()
	defer w.s.stageMu.Unlock()
	defer w.s.noteStaged()
	if len(key) > 0 && key[0] == tagRecord {
		w.s.spill.set(key, value)
		return nil
	}
	return w.s.pending.Set(key, value, nil)
}

func (w staging) Delete(key []byte, _ *pebble.WriteOptions) error {
	w.s.stageMu.Lock()
	defer w.s.stageMu.Unlock()
	defer w.s.noteStaged()
	if len(key) > 0 && key[0] == tagRecord {
		w.s.spill.delete(key)
		return nil
	}
	return w.s.pending.Delete(key, nil)
}

// spillToPending moves the spill into the pending batch, for the rare
// operations (definition changes at open) that iterate staged records.
func (s *Store) spillToPending() error {
	if len(s.spill.m) == 0 {
		return nil
	}
	for k, e := range s.spill.m {
		var err error
		if e.del {
			err = s.pending.Delete([]byte(k), nil)
		} else {
			err = s.pending.Set([]byte(k), e.val, nil)
		}
		if err != nil {
			return s.fail(err)
		}
		s.pendingFresh[k] = struct{}{}
	}
	s.pendingRecords = true
	s.spill = newSpill()
	return nil
}

// lookupStaged finds the newest staged write of a record key: the spill
// (cur: written since the last cut), then the spill of the commit in
// flight. found false: look further.
//
// The returned value stays valid after the lock is released: spilled
// values live in arena chunks that are only appended to until a commit
// (when no part is in use) resets them.
func (s *Store) lookupStaged(key []byte) (v []byte, del, cur, found bool) {
	s.stageMu.Lock()
	defer s.stageMu.Unlock()
	if v, del, ok := s.spill.get(key); ok {
		return v, del, true, true
	}
	if s.flight != nil {
		if v, del, ok := s.flight.spill.get(key); ok {
			return v, del, false, true
		}
	}
	return nil, false, false, false
}
