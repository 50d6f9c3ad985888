package store

import (
	"bytes"
	"fmt"
	"math"
	"slices"

	"github.com/cockroachdb/pebble/v2"
	"github.com/tallyward/tallyward/internal/sat"
)

// A commit's expiry sweep runs on its goroutine, after the frozen records
// are encoded, so the caller's cut does not wait for it. The caller
// cannot be told which records it removes before the commit lands, so
// both sides follow one rule instead, decided by a record's contents and
// the store's sweep watermark alone:
//
//   - Every commit sweeps at the sweep watermark, the highest watermark
//     any cut asked for (it never falls), and removes every record whose
//     own expiry bucket is at or below it: frozen records (encodeFrozen,
//     or claim when the caller gets there first), and every record an
//     index entry at or below it names, in Pebble or among the commit's
//     own writes (sweepFlight). No limit: the caller could not tell where
//     one stopped.
//   - So a record the caller holds that is not dirty (a cached slot, or
//     one read from Pebble, the pending batch's entries the commit took or
//     the spill of the commit in flight) whose bucket is at or below the
//     watermark was removed by a commit, landed or in flight: Get drops it
//     and reports it absent (Table.sweptAway). A record written since the
//     cut (the current spill, records a definition change rewrote into
//     the pending batch) is not judged until the next commit.
//
// This holds because every stored record has its index entry in its
// bucket, and a commit never writes a record whose bucket is at or below
// the watermark: frozen ones are deleted instead, and one written stale
// (staged by an eviction) is found by the next sweep through its entry.

// sweepTable is what the sweep needs of an expiring table; fixed once the
// table is set up, so the commit's goroutine reads it freely.
type sweepTable struct {
	name   string // the table's own name (keys parsed from entries view a buffer)
	bucket func(last int64) int64
	last   func(b []byte) (int64, error)
}

// sweepTables returns the expiring tables by name, and the number of
// parts of each.
func (s *Store) sweepTables() (map[string]sweepTable, map[string]int) {
	m, parts := map[string]sweepTable{}, map[string]int{}
	for _, f := range s.tables {
		if t, ok := f.(interface {
			sweeper() (string, sweepTable, int, bool)
		}); ok {
			if name, st, n, ok := t.sweeper(); ok {
				m[name], parts[name] = st, n
			}
		}
	}
	return m, parts
}

func (t *Table[V]) sweeper() (string, sweepTable, int, bool) {
	if t.ttl <= 0 {
		return "", sweepTable{}, 0, false
	}
	last := t.PeekLast
	if last == nil {
		decode := t.decode
		last = func(b []byte) (int64, error) {
			v, err := decode(b)
			if err != nil {
				return 0, err
			}
			return v.LastTime(), nil
		}
	}
	return t.name, sweepTable{name: t.name, bucket: t.bucket, last: last}, len(t.group()), true
}

// sweptAway reports whether a record in expiry bucket b, not dirty and
// not written since the last cut, was removed by a commit (see above).
func (t *Table[V]) sweptAway(b int64) bool { return swept(b, t.store.sweepW) }

// sweptQueue is a cache that drops the records commits removed.
type sweptQueue interface {
	queueSwept(gone *removedKeys)
}

// queueSwept queues, when a commit landed, the entities it removed that
// t may cache (gone: by table name and part), for it to drop a few at
// each Touch (dropSwept): Get already reports them absent, and dropping
// them gives their memory back without a walk on the caller's path. A
// part touched too rarely to keep up drops the excess here.
func (t *Table[V]) queueSwept(gone *removedKeys) {
	if byPart := gone.m[t.name]; t.part < len(byPart) {
		if q := byPart[t.part]; len(t.dropQ) == 0 {
			t.dropQ = q
		} else {
			t.dropQ = append(t.dropQ, q...)
		}
	}
	if excess := len(t.dropQ) - len(t.slots) - 64; excess > 0 {
		t.dropSwept(excess)
	}
}

// removedKeys lists the entities a commit removed, by table name and the
// part that may cache them, for queueSwept.
type removedKeys struct {
	parts map[string]int // number of parts by table name
	m     map[string][][]string
}

// add notes entity of table name; part is the part that caches it, or -1
// to work it out.
func (g *removedKeys) add(name, entity string, part int) {
	byPart := g.m[name]
	if byPart == nil {
		byPart = make([][]string, max(g.parts[name], 1))
		g.m[name] = byPart
	}
	if part < 0 {
		part = PartOf(entity, len(byPart))
	}
	byPart[part] = append(byPart[part], entity)
}

// dropSwept drops up to n queued entities whose cached slots are swept
// away, newest queued first. Reaching each one's slot is a chain of
// misses (index entry, slot position, slot, key and value), so each
// entity takes one step of its chain per entity dropped before it, as a
// worker's lookahead does, and several chains are in flight at once.
func (t *Table[V]) dropSwept(n int) {
	n = min(n, len(t.dropQ))
	q := t.dropQ[len(t.dropQ)-n:]
	var chain [dropRing]HintChain[V]
	for k := -HintSteps; k < n; k++ {
		for s := range HintSteps {
			if m := k + HintSteps - s; m >= 0 && m < n { // the entity taking step s now
				chain[m%dropRing].Step(t, s, q[n-1-m])
			}
		}
		if k < 0 {
			continue
		}
		sl := t.lookup(q[n-1-k])
		if sl != nil && sl.dirtyIn != t.store.gen && sl.dirtyIn != t.store.flightGen && t.sweptAway(sl.indexed) {
			sl.dirtyIn = 0
			t.recycle(sl)
		}
	}
	clear(q)
	t.dropQ = t.dropQ[:len(t.dropQ)-n]
}

// dropChunk is how many queued entities Touch drops at a time (two per
// Touch on average). Eight overlap enough chains to halve the drops' cost; 32 did no better
// and put about 2 µs on every sixteenth inline call (p99 of Score cache
// hits 13.8-14.5 -> 16.2-16.5 µs), where eight leave it unchanged.
const (
	dropRing  = 8 // > HintSteps, a power of two
	dropChunk = 8
)

// DropSwept drops from the caches every record the landed commits removed
// (Get reports them absent either way): a commit that must leave the
// cache as tidy as before calls it after Settle.
func (s *Store) DropSwept() {
	for _, f := range s.tables {
		if t, ok := f.(interface{ dropAllSwept() }); ok {
			t.dropAllSwept()
		}
	}
}

func (t *Table[V]) dropAllSwept() { t.dropSwept(len(t.dropQ)) }

// sweepFlight removes, into sw, every record swept at w that an expiry
// index entry at or below w names, and drops those entries. cs are the
// commit's other writes, sorted, one per key: they are newer than
// Pebble, so a record they write is judged by their bytes. It returns how
// many records it removed, and notes their entities in gone. It reads
// only Pebble's index entries, c's arena and tables. due is scratch.
//
// A record not written by this commit is judged by its entry, without a
// read (see below). The due entries are gathered first and their records
// judged in key order, so a record two due entries name (one stale, from
// this commit's own writes) comes up twice in a row.
func (s *Store) sweepFlight(c *collector, cs []entry, sw, due *collector, w int64, tables map[string]sweepTable, gone *removedKeys) (removed int, err error) {
	if w == math.MinInt64 {
		return 0, nil
	}
	lower := []byte{tagExpiry}
	upper := expiryKey(nil, sat.Add(w, 1), "", "")[:9]
	if w == math.MaxInt64 {
		upper = []byte{tagExpiry + 1}
	}
	find := func(k []byte) (int, bool) {
		return slices.BinarySearchFunc(cs, k, func(e entry, k []byte) int { return bytes.Compare(c.key(e), k) })
	}
	i, _ := find(lower)
	end, _ := find(upper)
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: lower, UpperBound: upper})
	if err != nil {
		return 0, err
	}
	defer it.Close()
	// The due entries, in key order, the commit's own writes winning, in
	// due (keys: the entry's record key; values: the entry).
	var key, rk []byte
	ok := it.First()
	for ok || i < end {
		var del bool
		switch {
		case !ok:
			key, del = append(key[:0], c.key(cs[i])...), cs[i].del()
			i++
		case i >= end:
			key = append(key[:0], it.Key()...)
			ok = it.Next()
		default:
			switch r := bytes.Compare(c.key(cs[i]), it.Key()); {
			case r < 0:
				key, del = append(key[:0], c.key(cs[i])...), cs[i].del()
				i++
			case r == 0:
				key, del = append(key[:0], c.key(cs[i])...), cs[i].del()
				i++
				ok = it.Next()
			default:
				key = append(key[:0], it.Key()...)
				ok = it.Next()
			}
		}
		if del {
			continue
		}
		_, table, entity, err := parseExpiryKey(key)
		if err != nil {
			return removed, err
		}
		sw.Delete(key, nil)
		if _, known := tables[table]; !known {
			// A table no longer defined: its records went with the
			// definition reset that removed it; the entry is stale.
			continue
		}
		rk = RecordKey(rk[:0], table, entity)
		due.Set(rk, key, nil)
	}
	if err := it.Error(); err != nil {
		return removed, err
	}
	due.sortByKey()
	dues := due.ents

	// A store whose entries are exact (Store.exactIndex) judges a record
	// it does not write by its entry: every write of a record moves its
	// entry in the same commit and every deletion deletes it. An older
	// store may hold stale entries (of records a definition change
	// deleted, say): it reads each record, with one iterator sought
	// forward.
	var recs *pebble.Iterator
	if !s.exactIndex {
		if recs, err = s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{tagRecord}, UpperBound: []byte{tagRecord + 1}}); err != nil {
			return removed, err
		}
		defer recs.Close()
	}
	var ek []byte
	var names arena // gone's entities: they outlive due, which is reused
	for n, d := range dues {
		rk := due.key(d)
		if n > 0 && bytes.Equal(due.key(dues[n-1]), rk) {
			continue // judged with its other entry
		}
		bucket, table, entity, _ := parseExpiryKey(due.val(d))
		st := tables[table]
		nb := bucket
		var val []byte
		read := false
		if j, found := find(rk); found {
			// Written by this commit: judged by its bytes.
			if cs[j].del() {
				continue
			}
			val, read = c.val(cs[j]), true
		} else if recs != nil {
			if !recs.SeekGE(rk) || !bytes.Equal(recs.Key(), rk) {
				if err := recs.Error(); err != nil {
					return removed, err
				}
				continue // no record: a stale entry
			}
			if val, err = recs.ValueAndErr(); err != nil {
				return removed, err
			}
			read = true
		}
		if read {
			last, err := st.last(val)
			if err != nil {
				return removed, fmt.Errorf("%w: record %q: %w", ErrCorrupt, rk, err)
			}
			nb = st.bucket(last)
		}
		if !swept(nb, w) {
			// A stale entry of a record alive: index it in its bucket
			// (where it may well be already).
			ek = expiryKey(ek[:0], nb, table, entity)
			sw.Set(ek, nil, nil)
			continue
		}
		sw.Delete(rk, nil)
		removed++
		gone.add(st.name, viewString(names.keep([]byte(entity))), -1)
		if nb != bucket {
			// Its own entry, if not due with this one.
			ek = expiryKey(ek[:0], nb, table, entity)
			sw.Delete(ek, nil)
		}
	}
	return removed, nil
}
