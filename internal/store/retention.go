package store

import (
	"bytes"
	"crypto/rand"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"unsafe"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward/internal/sat"
)

// More key tags (frozen numbers, see the package doc):
//
//	0x04 expiry      0x04 | 8-byte big-endian bucket (sign bit flipped) | uvarint len(table) | table | entity key -> empty
//	0x05 tombstone   0x05 | 16-byte salted SHA-256 of (table, entity key) -> empty
//
// The expiry index lets a commit find idle records without scanning them
// all. Tombstones remember erased entities without keeping their key: only
// a hash salted with a random per-store secret (meta "salt") is stored.
const (
	tagExpiry    byte = 0x04
	tagTombstone byte = 0x05
)

const metaSalt = "salt"

// metaExactIndex (empty value) marks a store created by code that keeps
// every stored record's expiry index entry in the record's own bucket.
const metaExactIndex = "exact-index"

// SweepLimit bounds the expiry index entries one Store.Sweep examines, so
// its cost stays proportional to the work since the last one. A commit's
// own sweep has no limit (see sweepflight.go).
const SweepLimit = 100_000

func expiryKey(dst []byte, bucket int64, table, entity string) []byte {
	dst = append(dst, tagExpiry)
	dst = binary.BigEndian.AppendUint64(dst, uint64(bucket)^(1<<63))
	dst = binary.AppendUvarint(dst, uint64(len(table)))
	dst = append(dst, table...)
	return append(dst, entity...)
}

// parseExpiryKey splits an expiry index key. The table and entity it
// returns share k's bytes (the sweep examines every due entry, and a copy
// of each was a third of its allocations): they are valid only while k
// is unchanged, so a caller that keeps one must copy it.
func parseExpiryKey(k []byte) (bucket int64, table, entity string, err error) {
	if len(k) < 10 || k[0] != tagExpiry {
		return 0, "", "", fmt.Errorf("%w: expiry key %q", ErrCorrupt, k)
	}
	bucket = int64(binary.BigEndian.Uint64(k[1:9]) ^ (1 << 63))
	n, w := binary.Uvarint(k[9:])
	if w <= 0 || uint64(len(k)-9-w) < n {
		return 0, "", "", fmt.Errorf("%w: expiry key %q", ErrCorrupt, k)
	}
	rest := k[9+w:]
	return bucket, viewString(rest[:n]), viewString(rest[n:]), nil
}

// viewString returns b's bytes as a string without copying; b must not
// change while the string is in use.
func viewString(b []byte) string {
	if len(b) == 0 {
		return ""
	}
	return unsafe.String(&b[0], len(b))
}

// expirer is a table that can judge and remove expired records.
type expirer interface {
	flusher
	tableName() string
	expire(b writer, indexKey []byte, bucket int64, entity string, w int64) (bool, error)
	expireDirty(b writer, w int64) (int, error)
}

// expireDirty removes the dirty cached records that are already expired
// as of w: they would otherwise be written, indexed and only swept at a
// later commit, so the live count would lag by a commit interval.
func (t *Table[V]) expireDirty(b writer, w int64) (int, error) {
	n := 0
	for _, sl := range t.dirty {
		if !t.isDirty(sl) || !t.expiredAt(sl, w) {
			continue
		}
		if err := t.removeExpired(b, sl); err != nil {
			return n, err
		}
		n++
	}
	return n, nil
}

// expiredAt reports whether sl's record is expired as of watermark w.
func (t *Table[V]) expiredAt(sl *Slot[V], w int64) bool {
	return t.ttl > 0 && w != math.MinInt64 && sat.Add(sl.Value.LastTime(), t.ttl) <= w
}

// removeExpired drops the cached, expired sl and writes the deletion of
// its record and index entry to b.
func (t *Table[V]) removeExpired(b writer, sl *Slot[V]) error {
	if sl.indexed != 0 {
		t.keybuf = expiryKey(t.keybuf[:0], sl.indexed, t.name, sl.Key)
		if err := b.Delete(t.keybuf, nil); err != nil {
			return err
		}
	}
	t.keybuf = RecordKey(t.keybuf[:0], t.name, sl.Key)
	if err := b.Delete(t.keybuf, nil); err != nil {
		return err
	}
	sl.dirtyIn = 0
	t.recycle(sl)
	return nil
}

func (t *Table[V]) tableName() string { return t.name }

// sweep examines up to SweepLimit expiry index entries with a bucket at or
// below w and removes, in b, the records whose last time + ttl <= w. It
// returns how many records it removed. Dirty cached records are left to
// the caller (expireDirty, or the freeze of a commit cut at w).
func (s *Store) sweep(b writer, w int64) (int, error) {
	if w == math.MinInt64 {
		return 0, nil
	}
	byName := map[string]expirer{}
	for _, t := range s.tables {
		if e, ok := t.(expirer); ok {
			byName[e.tableName()] = e
		}
	}
	upper := expiryKey(nil, sat.Add(w, 1), "", "")[:9]
	if w == math.MaxInt64 {
		upper = []byte{tagExpiry + 1}
	}
	it, err := s.pending.NewIter(&pebble.IterOptions{LowerBound: []byte{tagExpiry}, UpperBound: upper})
	if err != nil {
		return 0, err
	}
	defer it.Close()
	removed := 0
	n := 0
	var key []byte // the entry's key: entity below is a view of it
	for ok := it.First(); ok && n < SweepLimit; ok = it.Next() {
		n++
		key = append(key[:0], it.Key()...)
		bucket, table, entity, err := parseExpiryKey(key)
		if err != nil {
			return removed, err
		}
		t := byName[table]
		if t == nil {
			// A table no longer defined: its records are dropped by the
			// definition reset that removed it; the entry is stale.
			if err := b.Delete(key, nil); err != nil {
				return removed, err
			}
			continue
		}
		gone, err := t.expire(b, key, bucket, entity, w)
		if err != nil {
			return removed, err
		}
		if gone {
			removed++
		}
	}
	return removed, it.Error()
}

// expire handles one expiry index entry at or below the watermark w.
func (t *Table[V]) expire(b writer, indexKey []byte, bucket int64, entity string, w int64) (bool, error) {
	if o := t.owner(entity); o != t {
		return o.expire(b, indexKey, bucket, entity, w)
	}
	var last int64
	sl := t.lookup(entity)
	found := sl != nil
	if found {
		last = sl.Value.LastTime()
	} else if !t.knownAbsent {
		var err error
		if last, found, err = t.loadLast(entity); err != nil {
			return false, err
		}
	}
	if err := b.Delete(indexKey, nil); err != nil {
		return false, err
	}
	if !found {
		return false, nil
	}
	if sat.Add(last, t.ttl) > w {
		// Updated since the entry was written: re-index it where it now
		// belongs.
		if sl != nil {
			if sl.indexed == bucket {
				sl.indexed = 0
			}
			t.markDirty(sl)
			return false, nil
		}
		t.keybuf = expiryKey(t.keybuf[:0], t.bucket(last), t.name, entity)
		return false, b.Set(t.keybuf, nil, nil)
	}
	if sl != nil {
		sl.dirtyIn = 0
		t.recycle(sl)
	}
	t.keybuf = RecordKey(t.keybuf[:0], t.name, entity)
	return true, b.Delete(t.keybuf, nil)
}

// loadLast reads the newest time of a stored record, with PeekLast when
// set.
func (t *Table[V]) loadLast(entity string) (last int64, found bool, err error) {
	if t.PeekLast == nil {
		v, found, _, err := t.load(entity)
		if err != nil || !found {
			return 0, found, err
		}
		return v.LastTime(), true, nil
	}
	t.keybuf = RecordKey(t.keybuf[:0], t.name, entity)
	found, err = t.store.getRaw(t.keybuf, func(b []byte) error {
		var perr error
		last, perr = t.PeekLast(b)
		if perr != nil {
			return fmt.Errorf("%w: %w", ErrCorrupt, perr)
		}
		return nil
	})
	return last, found, err
}

// RebuildExpiry rewrites this table's expiry index entries from its
// records, for a store whose ttl changed. It stages the writes for the
// next commit and visits every record of the table.
func (t *Table[V]) RebuildExpiry() (err error) {
	defer t.store.guard(&err)
	if err := t.store.check(); err != nil {
		return err
	}
	if err := t.store.spillToPending(); err != nil {
		return err
	}
	b := t.store.pending
	// Index entries of every bucket: scan the index for this table.
	it, err := b.NewIter(&pebble.IterOptions{LowerBound: []byte{tagExpiry}, UpperBound: []byte{tagExpiry + 1}})
	if err != nil {
		return t.store.fail(err)
	}
	var stale [][]byte
	for ok := it.First(); ok; ok = it.Next() {
		if _, table, _, err := parseExpiryKey(it.Key()); err == nil && table == t.name {
			stale = append(stale, bytes.Clone(it.Key()))
		}
	}
	if err := it.Close(); err != nil {
		return t.store.fail(err)
	}
	for _, k := range stale {
		if err := b.Delete(k, nil); err != nil {
			return t.store.fail(err)
		}
	}
	return t.Rewrite(func(entity string, val []byte) ([]byte, error) {
		v, err := t.decode(val)
		if err != nil {
			return nil, fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
		if bk := t.bucket(v.LastTime()); bk != 0 {
			if err := b.Set(expiryKey(nil, bk, t.name, entity), nil, nil); err != nil {
				return nil, err
			}
		}
		if sl := t.owner(entity).lookup(entity); sl != nil {
			sl.indexed = t.bucket(v.LastTime())
		}
		return val, nil
	})
}

// Rewrite passes every stored record of the table to fn and stages what fn
// returns in its place (nil deletes the record). It is for definition
// changes at open; cached entries must not be dirty.
func (t *Table[V]) Rewrite(fn func(entity string, val []byte) ([]byte, error)) (err error) {
	defer t.store.guard(&err)
	lower := RecordKey(nil, t.name, "")
	upper := prefixEnd(lower)
	if err := t.store.spillToPending(); err != nil {
		return err
	}
	t.store.pendingRecords = true
	b := t.store.pending
	it, err := b.NewIter(&pebble.IterOptions{LowerBound: lower, UpperBound: upper})
	if err != nil {
		return t.store.fail(err)
	}
	// kv is a changed record and the expiry buckets of its old and new
	// value (0: none), whose index entry moves with it.
	type kv struct {
		k, v   []byte
		ob, nb int64
	}
	var out []kv
	for ok := it.First(); ok; ok = it.Next() {
		entity := string(it.Key()[len(lower):])
		nv, err := fn(entity, it.Value())
		if err != nil {
			it.Close()
			return fmt.Errorf("state: key %q: %w", it.Key(), err)
		}
		if nv == nil || !bytes.Equal(nv, it.Value()) {
			e := kv{k: bytes.Clone(it.Key()), v: bytes.Clone(nv)}
			if e.ob, err = t.valueBucket(it.Value()); err == nil && nv != nil {
				e.nb, err = t.valueBucket(nv)
			}
			if err != nil {
				it.Close()
				return fmt.Errorf("state: key %q: %w", it.Key(), err)
			}
			out = append(out, e)
		}
	}
	if err := it.Close(); err != nil {
		return t.store.fail(err)
	}
	if len(out) > 0 {
		for _, p := range t.group() {
			p.knownAbsent = false
		}
	}
	for _, e := range out {
		o := t.owner(string(e.k[len(lower):]))
		if sl := getSlotBytes(&o.index, o.slots, e.k[len(lower):]); sl != nil {
			sl.dirtyIn = 0
			o.drop(sl)
		}
		if e.v == nil {
			err = b.Delete(e.k, nil)
		} else {
			err = b.Set(e.k, e.v, nil)
		}
		if err == nil && e.ob != e.nb {
			// Every stored record's index entry is in its own bucket
			// (the commit's sweep relies on it: sweepflight.go).
			entity := string(e.k[len(lower):])
			if e.ob != 0 {
				err = b.Delete(expiryKey(nil, e.ob, t.name, entity), nil)
			}
			if err == nil && e.nb != 0 {
				err = b.Set(expiryKey(nil, e.nb, t.name, entity), nil, nil)
			}
		}
		if err != nil {
			return t.store.fail(err)
		}
		t.store.pendingFresh[string(e.k)] = struct{}{}
	}
	return nil
}

// valueBucket returns the expiry bucket of a stored record (0 when the
// table keeps records forever).
func (t *Table[V]) valueBucket(val []byte) (int64, error) {
	if t.ttl <= 0 {
		return 0, nil
	}
	var last int64
	if t.PeekLast != nil {
		var err error
		if last, err = t.PeekLast(val); err != nil {
			return 0, fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
	} else {
		v, err := t.decode(val)
		if err != nil {
			return 0, fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
		last = v.LastTime()
	}
	return t.bucket(last), nil
}

// prefixEnd returns the smallest key greater than every key with prefix p.
func prefixEnd(p []byte) []byte {
	end := bytes.Clone(p)
	for i := len(end) - 1; i >= 0; i-- {
		if end[i] < 0xff {
			end[i]++
			return end[:i+1]
		}
	}
	return nil
}

// ensureSalt loads or creates the store's tombstone salt and loads the
// tombstones into memory (erasures are rare; the set is small).
func (s *Store) ensureSalt() (found bool, err error) {
	found, err = s.getRaw(metaKey(metaSalt), func(v []byte) error {
		if len(v) != 32 {
			return fmt.Errorf("%w: salt of %d bytes", ErrCorrupt, len(v))
		}
		s.salt = bytes.Clone(v)
		return nil
	})
	if err != nil {
		return found, err
	}
	if !found {
		s.salt = make([]byte, 32)
		rand.Read(s.salt)
		if err := s.pending.Set(metaKey(metaSalt), s.salt, nil); err != nil {
			return found, s.fail(err)
		}
	}
	s.tombstones = map[[16]byte]struct{}{}
	it, err := s.pending.NewIter(&pebble.IterOptions{LowerBound: []byte{tagTombstone}, UpperBound: []byte{tagTombstone + 1}})
	if err != nil {
		return found, s.fail(err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		var h [16]byte
		if len(it.Key()) != 17 {
			it.Close()
			return found, fmt.Errorf("%w: tombstone key %q", ErrCorrupt, it.Key())
		}
		copy(h[:], it.Key()[1:])
		s.tombstones[h] = struct{}{}
	}
	return found, it.Close()
}

func (s *Store) tombstoneHash(table, entity string) [16]byte {
	h := sha256.New()
	h.Write(s.salt)
	var n [binary.MaxVarintLen64]byte
	h.Write(n[:binary.PutUvarint(n[:], uint64(len(table)))])
	h.Write([]byte(table))
	h.Write([]byte(entity))
	var out [16]byte
	copy(out[:], h.Sum(nil))
	return out
}

// Erased reports whether (table, entity) has a tombstone. Cheap when
// nothing was ever erased.
func (s *Store) Erased(table, entity string) bool {
	if len(s.tombstones) == 0 {
		return false
	}
	_, ok := s.tombstones[s.tombstoneHash(table, entity)]
	return ok
}

// SetTombstone stages (on) or removes (off) the tombstone of (table,
// entity).
func (s *Store) SetTombstone(table, entity string, on bool) error {
	if err := s.check(); err != nil {
		return err
	}
	h := s.tombstoneHash(table, entity)
	key := append([]byte{tagTombstone}, h[:]...)
	var err error
	if on {
		s.tombstones[h] = struct{}{}
		err = s.pending.Set(key, nil, nil)
	} else {
		delete(s.tombstones, h)
		err = s.pending.Delete(key, nil)
	}
	if err != nil {
		return s.fail(err)
	}
	return nil
}

// Snapshot writes a consistent copy of the store as of its last commit
// (records, definitions, Mark) to dir, which must not exist, on the
// store's filesystem. Call Commit first to include recent changes. The
// copy opens as a store of its own: Options{Dir: dir}.
func (s *Store) Snapshot(dir string) (err error) {
	defer s.guard(&err)
	if err := s.Settle(); err != nil {
		return err
	}
	if err := s.db.Checkpoint(dir, pebble.WithFlushedWAL()); err != nil {
		return fmt.Errorf("state: snapshot to %q: %w", dir, err)
	}
	return nil
}

// CopySnapshot copies a snapshot directory src on srcFS to dst on dstFS,
// e.g. onto another disk or machine-local directory before opening it.
func CopySnapshot(srcFS vfs.FS, src string, dstFS vfs.FS, dst string) error {
	if srcFS == nil {
		srcFS = vfs.Default
	}
	if dstFS == nil {
		dstFS = vfs.Default
	}
	ok, err := vfs.Clone(srcFS, dstFS, src, dst)
	if err != nil {
		return fmt.Errorf("state: copy snapshot %q to %q: %w", src, dst, err)
	}
	if !ok {
		return fmt.Errorf("state: copy snapshot: %q: %w", src, errors.New("no such directory"))
	}
	return nil
}
