package store

import (
	"bytes"
	"fmt"
	"maps"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
)

// roundUp is the naive expiry bucket: the smallest multiple of g at or
// above x (never 0).
func roundUp(x, g int64) int64 {
	b := x - x%g
	if x%g > 0 {
		b += g
	}
	if b == 0 {
		b = g
	}
	return b
}

// checkIndex asserts that the committed expiry index of table holds
// exactly one entry per committed record, at the bucket of its newest
// time, and nothing else.
func checkIndex(t *testing.T, db *pebble.DB, table string, ttl int64) {
	t.Helper()
	recs := storedRecords(t, db, table)
	want := map[string]bool{}
	if ttl > 0 {
		for k, r := range recs {
			want[string(expiryKey(nil, roundUp(r.Last+ttl, max(ttl/16, 1)), table, k))] = true
		}
	}
	got := map[string]bool{}
	for k := range scanRaw(t, db, tagExpiry) {
		if _, tb, _, err := parseExpiryKey([]byte(k)); err != nil || tb == table {
			got[k] = true
		}
	}
	if !maps.Equal(got, want) {
		t.Fatalf("expiry index of %s: %d entries, want %d (records %d)", table, len(got), len(want), len(recs))
	}
}

// TestExpiryMatchesModel runs seeded upserts with advancing event times,
// and at each commit Sweep(w) with a watermark w that trails them. A
// record is removed by Sweep(w)+Commit iff
//
//   - it is dirty in the cache and last+ttl <= w (removed at once), or
//   - otherwise, its index bucket, last+ttl rounded up to a multiple of
//     ttl/16, is <= w (removal lags expiry by less than ttl/16).
//
// A record with last+ttl > w is never removed. After every commit the
// committed records equal the model and the index is exact.
func TestExpiryMatchesModel(t *testing.T) {
	t.Parallel()
	// cut: the sweep runs in the commit (SweepCommitAsync) at the sweep
	// watermark, the highest w so far since the store opened, and removes
	// every record whose bucket is at or below it, dirty or not; new
	// records reuse the values Get drops. big: the cache never evicts,
	// so the table knows that what it does not cache is absent.
	// legacy: the store is taken for one an older version made (no
	// exact-index mark), whose sweeps read the records they remove.
	cases := []struct{ peek, cut, big, legacy bool }{
		{false, false, false, false}, {true, false, false, false}, {true, true, false, false},
		{false, true, false, false}, {true, true, true, false}, {false, false, true, false},
		{true, true, false, true}, {false, true, true, true},
	}
	for _, c := range cases {
		peek := c.peek
		cacheBytes := int64(8_000)
		if c.big {
			cacheBytes = 1 << 30
		}
		t.Run(fmt.Sprintf("peek=%v/cut=%v/big=%v/legacy=%v", peek, c.cut, c.big, c.legacy), func(t *testing.T) {
			const ttl = 1600
			r := rand.New(rand.NewPCG(11, 12))
			fs := vfs.NewMem()
			s := mustOpen(t, Options{FS: fs, CacheBytes: cacheBytes})
			defer func() { s.Close() }()
			open := func() *Table[*tv] {
				s.exactIndex = s.exactIndex && !c.legacy
				tb := NewTable(s, "x", ttl, decodeTV)
				if peek {
					tb.PeekLast = peekTV
				}
				return tb
			}
			tb := open()
			steps := 150
			if raceEnabled {
				steps = 80
			}
			model := map[string]rec{}
			clock := int64(0)
			removedTotal, sinceOpen := 0, 0
			sweepW := int64(math.MinInt64)
			for step := range steps {
				for range 40 {
					k := fmt.Sprintf("u%03d", r.IntN(300))
					clock += r.Int64N(8)
					sl, err := tb.Get(k)
					if err != nil {
						t.Fatal(err)
					}
					if (sl == nil) == (model[k] != rec{}) {
						t.Fatalf("step %d: get %s = %v, model %+v", step, k, sl, model[k])
					}
					if sl == nil {
						v := rec{Last: clock, N: 1, Pad: r.IntN(60)}
						if old, ok := tb.Reuse(); ok && c.cut {
							*old = *v.value()
							tb.Insert(k, old)
						} else {
							tb.Insert(k, v.value())
						}
						model[k] = v
						continue
					}
					sl.Value.Last = max(sl.Value.Last, clock-r.Int64N(50))
					sl.Value.N++
					tb.Touch(sl)
					model[k] = recOf(sl.Value)
				}
				w := clock - 300 - r.Int64N(1500)
				sweepW = max(sweepW, w)
				var expect []string
				for k, v := range model {
					sl := tb.lookup(k)
					switch {
					case c.cut:
						if roundUp(v.Last+ttl, ttl/16) <= sweepW {
							expect = append(expect, k)
						}
					case sl != nil && tb.isDirty(sl):
						if v.Last+ttl <= w {
							expect = append(expect, k)
						}
					case roundUp(v.Last+ttl, ttl/16) <= w:
						expect = append(expect, k)
					}
				}
				var n int
				var err error
				if c.cut {
					err = s.SweepCommitAsync(w, func(removed int) Mark {
						n = removed
						return Mark{Seen: uint64(step), Watermark: w}
					})
					if err == nil {
						err = s.Settle()
					}
				} else {
					n, err = s.Sweep(w)
				}
				if err != nil {
					t.Fatal(err)
				}
				if n != len(expect) {
					t.Fatalf("step %d: sweep(%d) removed %d, model %d", step, w, n, len(expect))
				}
				for _, k := range expect {
					delete(model, k)
				}
				removedTotal += n
				sinceOpen += n
				if c.cut && s.Swept() != uint64(sinceOpen) {
					t.Fatalf("step %d: Swept() = %d, removed %d since open", step, s.Swept(), sinceOpen)
				}
				if c.cut {
					// Every removed record the cache held was queued for it
					// to drop.
					s.DropSwept()
					for _, sl := range tb.slots {
						if k := sl.Key; !tb.isDirty(sl) && tb.sweptAway(sl.indexed) {
							t.Fatalf("step %d: %s, removed, still cached after DropSwept", step, k)
						}
					}
				}
				if !c.cut {
					if err := s.Commit(Mark{Seen: uint64(step), Watermark: w}); err != nil {
						t.Fatal(err)
					}
				}
				if err := checkCacheInvariants(s); err != nil {
					t.Fatalf("step %d: %v", step, err)
				}
				if got := storedRecords(t, s.DB(), "x"); !maps.Equal(got, model) {
					t.Fatalf("step %d: committed %d records, model %d", step, len(got), len(model))
				}
				checkIndex(t, s.DB(), "x", ttl)
				if step%40 == 39 {
					s.Close()
					s = mustOpen(t, Options{FS: fs, CacheBytes: cacheBytes})
					tb = open()
					sweepW, sinceOpen = math.MinInt64, 0
				}
			}
			if removedTotal < 100 {
				t.Fatalf("only %d records expired; the run does not exercise expiry", removedTotal)
			}
		})
	}
}

// TestExpiryIndexSelfHeals plants stale index entries (a record that no
// longer exists, an old bucket of a record updated since, cached and not,
// and a table no longer defined) and checks one sweep removes or moves
// them all without removing a live record.
func TestExpiryIndexSelfHeals(t *testing.T) {
	const ttl = 160
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs})
	tb := NewTable(s, "x", ttl, decodeTV)
	tb.Insert("cached", rec{Last: 1000, N: 1}.value())
	tb.Insert("stored", rec{Last: 1000, N: 1}.value())
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	s.Close()
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	tb = NewTable(s, "x", ttl, decodeTV)
	if sl, err := tb.Get("cached"); sl == nil || err != nil {
		t.Fatal(sl, err)
	}
	for _, k := range [][]byte{
		expiryKey(nil, 100, "x", "gone"),
		expiryKey(nil, 100, "x", "cached"),
		expiryKey(nil, 100, "x", "stored"),
		expiryKey(nil, 100, "dropped-table", "y"),
	} {
		if err := s.pending.Set(k, nil, nil); err != nil {
			t.Fatal(err)
		}
	}
	n, err := s.Sweep(500)
	if err != nil || n != 0 {
		t.Fatalf("sweep: %d %v", n, err)
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	checkIndex(t, s.DB(), "x", ttl)
	if got := len(scanRaw(t, s.DB(), tagExpiry)); got != 2 {
		t.Fatalf("%d index entries left, want 2", got)
	}
	// The healed entries still expire the records on time.
	if n, err := s.Sweep(1000 + ttl + ttl/16); err != nil || n != 2 {
		t.Fatalf("final sweep: %d %v", n, err)
	}
}

func TestRebuildExpiryAfterTTLChange(t *testing.T) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs, CacheBytes: 4_000})
	tb := NewTable(s, "x", 1600, decodeTV)
	r := rand.New(rand.NewPCG(5, 6))
	model := map[string]rec{}
	for i := range 200 {
		v := rec{Last: r.Int64N(10_000), N: 1}
		k := fmt.Sprintf("r%03d", i)
		tb.Insert(k, v.value())
		model[k] = v
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	checkIndex(t, s.DB(), "x", 1600)
	s.Close()
	for _, ttl := range []int64{3200, 320, 0, 1600} {
		s = mustOpen(t, Options{FS: fs, CacheBytes: 4_000})
		tb = NewTable(s, "x", ttl, decodeTV)
		tb.Get("r007") // a cached entry must take the new bucket too
		if err := tb.RebuildExpiry(); err != nil {
			t.Fatal(err)
		}
		if err := s.Commit(Mark{}); err != nil {
			t.Fatal(err)
		}
		checkIndex(t, s.DB(), "x", ttl)
		s.Close()
	}
	// Expiry now follows ttl 1600.
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	NewTable(s, "x", 1600, decodeTV)
	w := int64(7000)
	want := 0
	for _, v := range model {
		if roundUp(v.Last+1600, 100) <= w {
			want++
		}
	}
	if n, err := s.Sweep(w); err != nil || n != want {
		t.Fatalf("sweep after rebuild: %d %v, want %d", n, err, want)
	}
}

// TestSweepLimit: one sweep examines at most SweepLimit index entries;
// the next picks up the rest.
func TestSweepLimit(t *testing.T) {
	if raceEnabled || testing.Short() {
		t.Skip("writes and sweeps more than 100k entries: run without -race and -short")
	}
	extra := 37
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs})
	NewTable(s, "x", 16, decodeTV)
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	b := s.DB().NewBatch()
	val, _ := (&tv{Last: 1, N: 1}).AppendBinary(nil)
	for i := range SweepLimit + extra {
		k := fmt.Sprintf("s%06d", i)
		b.Set(RecordKey(nil, "x", k), val, nil)
		b.Set(expiryKey(nil, 17, "x", k), nil, nil)
	}
	if err := b.Commit(pebble.Sync); err != nil {
		t.Fatal(err)
	}
	s.Close()
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	tb := NewTable(s, "x", 16, decodeTV)
	tb.PeekLast = peekTV
	for i, want := range []int{SweepLimit, extra, 0} {
		n, err := s.Sweep(100)
		if err != nil || n != want {
			t.Fatalf("sweep %d: %d %v, want %d", i, n, err, want)
		}
		if err := s.Commit(Mark{}); err != nil {
			t.Fatal(err)
		}
	}
	if got := len(scanRaw(t, s.DB(), tagRecord)); got != 0 {
		t.Fatalf("%d records left", got)
	}
}

func TestTombstones(t *testing.T) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs})
	const secret = "person-4471-secret-key"
	if s.Erased("t", secret) {
		t.Fatal("erased before any tombstone")
	}
	for _, e := range []struct{ table, entity string }{{"t", secret}, {"t", "other"}, {"u", "x"}} {
		if err := s.SetTombstone(e.table, e.entity, true); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.SetTombstone("t", "other", false); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	if err := s.SetTombstone("t", "uncommitted", true); err != nil || !s.Erased("t", "uncommitted") {
		t.Fatal("staged tombstone not visible", err)
	}
	s.Close()
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	for _, c := range []struct {
		table, entity string
		want          bool
	}{{"t", secret, true}, {"u", "x", true}, {"t", "other", false}, {"t", "uncommitted", false}, {"u", secret, false}, {"t", "x", false}} {
		if got := s.Erased(c.table, c.entity); got != c.want {
			t.Errorf("Erased(%s, %s) = %v", c.table, c.entity, got)
		}
	}
	ts := scanRaw(t, s.DB(), tagTombstone)
	if len(ts) != 2 {
		t.Fatalf("%d tombstones stored, want 2", len(ts))
	}
	it, err := s.DB().NewIter(nil)
	if err != nil {
		t.Fatal(err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		if it.Key()[0] == tagTombstone && (len(it.Key()) != 17 || len(it.Value()) != 0) {
			t.Errorf("tombstone %q = %q", it.Key(), it.Value())
		}
		if bytes.Contains(it.Key(), []byte(secret)) || bytes.Contains(it.Value(), []byte(secret)) {
			t.Errorf("key bytes of the erased entity stored under %q", it.Key())
		}
	}
	it.Close()
}

func TestSnapshotRoundTrip(t *testing.T) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs, CacheBytes: 2_000})
	defer s.Close()
	tb := NewTable(s, "t", 100, decodeTV)
	model := map[string]rec{}
	for i := range 100 {
		v := rec{Last: int64(i), N: uint64(i), Pad: i}
		tb.Insert(fmt.Sprintf("n%02d", i), v.value())
		model[fmt.Sprintf("n%02d", i)] = v
	}
	if err := s.SetTombstone("t", "gone", true); err != nil {
		t.Fatal(err)
	}
	if err := s.SetDefinition("t.f", []byte("fp")); err != nil {
		t.Fatal(err)
	}
	mark := Mark{Seen: 5, Resume: 4, Watermark: 99, Cursor: []byte("c"), Extra: []byte("e")}
	if err := s.Commit(mark); err != nil {
		t.Fatal(err)
	}
	// Not committed: not in the snapshot.
	tb.Insert("late", rec{Last: 1}.value())
	if _, err := tb.Delete("n03"); err != nil {
		t.Fatal(err)
	}
	if err := s.Snapshot("snap"); err != nil {
		t.Fatal(err)
	}
	if err := s.Snapshot("snap"); err == nil {
		t.Fatal("snapshot over an existing directory")
	}
	dst := vfs.NewMem()
	if err := CopySnapshot(fs, "snap", dst, "copy"); err != nil {
		t.Fatal(err)
	}
	if err := CopySnapshot(fs, "no-such-dir", dst, "copy2"); err == nil {
		t.Fatal("copy of a missing snapshot")
	}
	c := mustOpen(t, Options{FS: dst, Dir: "copy"})
	defer c.Close()
	if m := c.Mark(); m.Seen != 5 || m.Resume != 4 || m.Watermark != 99 || string(m.Cursor) != "c" || string(m.Extra) != "e" {
		t.Fatalf("snapshot mark %+v", m)
	}
	if got := storedRecords(t, c.DB(), "t"); !maps.Equal(got, model) {
		t.Fatalf("snapshot holds %d records, want %d", len(got), len(model))
	}
	checkIndex(t, c.DB(), "t", 100)
	if !c.Erased("t", "gone") || c.Erased("t", "n01") {
		t.Fatal("snapshot tombstones differ")
	}
	if d, err := c.Definitions(); err != nil || string(d["t.f"]) != "fp" {
		t.Fatalf("snapshot definitions %v %v", d, err)
	}
}

func TestRewrite(t *testing.T) {
	fs := vfs.NewMem()
	s := mustOpen(t, Options{FS: fs, CacheBytes: 3_000})
	tb := NewTable(s, "t", 0, decodeTV)
	other := NewTable(s, "t2", 0, decodeTV)
	model := map[string]rec{}
	for i := range 60 {
		v := rec{Last: int64(i), N: uint64(i)}
		tb.Insert(fmt.Sprintf("w%02d", i), v.value())
		other.Insert(fmt.Sprintf("w%02d", i), v.value())
		model[fmt.Sprintf("w%02d", i)] = v
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	seen := 0
	err := tb.Rewrite(func(entity string, val []byte) ([]byte, error) {
		seen++
		v, err := decodeTV(val)
		if err != nil {
			return nil, err
		}
		switch {
		case v.N%3 == 0:
			delete(model, entity)
			return nil, nil
		case v.N%2 == 0:
			v.N += 1000
			model[entity] = recOf(v)
			return v.AppendBinary(nil)
		}
		return val, nil
	})
	if err != nil || seen != 60 {
		t.Fatalf("rewrite: %v, visited %d", err, seen)
	}
	// Visible before the commit, through the cache.
	for i := range 60 {
		k := fmt.Sprintf("w%02d", i)
		sl, err := tb.Get(k)
		want, ok := model[k]
		if err != nil || (sl != nil) != ok || (ok && recOf(sl.Value) != want) {
			t.Fatalf("get %s after rewrite: %v %v, want %+v", k, sl, err, want)
		}
	}
	if err := s.Commit(Mark{Seen: 1}); err != nil {
		t.Fatal(err)
	}
	s.Close()
	s = mustOpen(t, Options{FS: fs})
	defer s.Close()
	if got := storedRecords(t, s.DB(), "t"); !maps.Equal(got, model) {
		t.Fatalf("rewritten table holds %d, want %d", len(got), len(model))
	}
	if got := storedRecords(t, s.DB(), "t2"); len(got) != 60 {
		t.Fatalf("other table changed: %d records", len(got))
	}
}

// TestSweptRecordsLeaveTheCache: records a commit removes are reported
// absent by Get from the cut on, and leave the caches of every table once
// the commit landed and DropSwept ran, with tables of different names
// swept in one commit (their entries interleave in the index).
func TestSweptRecordsLeaveTheCache(t *testing.T) {
	s := mustOpen(t, Options{FS: vfs.NewMem(), CacheBytes: 1 << 30})
	defer s.Close()
	const ttl = 1600
	tables := []*Table[*tv]{NewTable(s, "account", ttl, decodeTV), NewTable(s, "device", ttl, decodeTV)}
	for i := range 500 {
		for j, tb := range tables {
			tb.Insert(fmt.Sprintf("k%03d", i), rec{Last: int64(i + j), N: 1}.value())
		}
	}
	if err := s.Commit(Mark{Seen: 1}); err != nil {
		t.Fatal(err)
	}
	var removed int
	if err := s.SweepCommitAsync(10_000, func(n int) Mark { removed = n; return Mark{Seen: 2} }); err != nil {
		t.Fatal(err)
	}
	for _, tb := range tables {
		if sl, err := tb.Get("k007"); err != nil || sl != nil {
			t.Fatalf("%s: Get of a swept record during the commit = %v, %v", tb.name, sl, err)
		}
	}
	if err := s.Settle(); err != nil {
		t.Fatal(err)
	}
	s.DropSwept()
	if removed != 1000 || s.Swept() != 1000 {
		t.Fatalf("removed %d, Swept %d, want 1000", removed, s.Swept())
	}
	for _, tb := range tables {
		if tb.Len() != 0 {
			t.Fatalf("%s: %d records still cached", tb.name, tb.Len())
		}
	}
	if got := storedRecords(t, s.DB(), "account"); len(got) != 0 {
		t.Fatalf("%d records stored", len(got))
	}
}

// TestLegacySweepSkipsStaleEntries: in a store an older version made, an
// index entry may name a record that no longer exists (a definition change
// deleted records without their entries); its sweep reads the record and
// drops such an entry without counting a removal.
func TestLegacySweepSkipsStaleEntries(t *testing.T) {
	s := mustOpen(t, Options{FS: vfs.NewMem(), CacheBytes: 1 << 30})
	defer s.Close()
	s.exactIndex = false
	const ttl = 1600
	tb := NewTable(s, "x", ttl, decodeTV)
	tb.Insert("alive", rec{Last: 10, N: 1}.value())
	if err := s.pending.Set(expiryKey(nil, tb.bucket(5), "x", "gone"), nil, nil); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(Mark{Seen: 1}); err != nil {
		t.Fatal(err)
	}
	var removed int
	if err := s.SweepCommitAsync(10_000, func(n int) Mark { removed = n; return Mark{Seen: 2} }); err != nil {
		t.Fatal(err)
	}
	if err := s.Settle(); err != nil {
		t.Fatal(err)
	}
	if removed != 1 {
		t.Fatalf("removed %d, want 1 (the stale entry's record does not exist)", removed)
	}
	if n := len(scanRaw(t, s.DB(), tagExpiry)); n != 0 {
		t.Fatalf("%d expiry entries left", n)
	}
}
