package store

import (
	"bytes"
	"errors"
	"fmt"
	"maps"
	"math/rand/v2"
	"strings"
	"testing"
	"unsafe"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
)

// modelRun drives two tables of one store with a seeded random sequence of
// Get, upsert (Insert or mutate + Touch), Delete, Commit and reopen, and
// checks after every operation that
//
//   - Get sees exactly the naive model of the current state (a Go map),
//   - the committed database (what a fresh reopen reads) holds exactly the
//     model as of the last Commit, for the key just used and, at each
//     Commit, for every key,
//   - the cache invariants hold (budget.used == sum of slot sizes, slot
//     indexes, map and slot list agree).
//
// The table names "a" and "ab" share a prefix, so a key layout that
// confused them would show.
type modelRun struct {
	seed       uint64
	ops        int
	keys       int
	cacheBytes int64
	reopenP    float64 // probability of a reopen per operation
	// sabotage, if set, runs after every operation with the live tables;
	// used to check that the model catches a broken cache.
	sabotage func(ts []*Table[*tv])
}

type modelStats struct {
	evictions, absentMisses, dirtyStaged, reopens, commits int
}

var modelTables = []string{"a", "ab"}

func (c modelRun) run() (st modelStats, err error) {
	r := rand.New(rand.NewPCG(c.seed, 0x5eed))
	fs := vfs.NewMem()
	opts := Options{FS: fs, CacheBytes: c.cacheBytes}
	keys := make([]string, c.keys)
	for i := range keys {
		keys[i] = fmt.Sprintf("k%03d", i)
	}
	cur := []map[string]rec{{}, {}}
	committed := []map[string]rec{{}, {}}
	var mark Mark
	clock := int64(1_000)

	var s *Store
	var ts []*Table[*tv]
	open := func() error {
		var err error
		if s, err = Open(opts); err != nil {
			return err
		}
		ts = ts[:0]
		for _, name := range modelTables {
			ts = append(ts, NewTable(s, name, 0, decodeTV))
		}
		for i, t := range ts {
			if want := len(committed[i]) == 0; t.knownAbsent != want {
				return fmt.Errorf("table %s opened over %d records: knownAbsent = %v", t.name, len(committed[i]), t.knownAbsent)
			}
		}
		return nil
	}
	if err := open(); err != nil {
		return st, err
	}
	defer func() {
		if s != nil {
			s.Close()
		}
	}()

	// get compares Get with the model.
	get := func(ti int, k string) (*Slot[*tv], error) {
		t := ts[ti]
		cached := t.lookup(k) != nil
		wasAbsent := t.knownAbsent
		sl, err := t.Get(k)
		if err != nil {
			return nil, fmt.Errorf("get %s/%s: %w", t.name, k, err)
		}
		want, ok := cur[ti][k]
		switch {
		case sl == nil && ok:
			return nil, fmt.Errorf("get %s/%s: absent, model has %+v (cached=%v knownAbsent=%v)", t.name, k, want, cached, wasAbsent)
		case sl != nil && !ok:
			return nil, fmt.Errorf("get %s/%s: found %+v, model has none", t.name, k, recOf(sl.Value))
		case sl != nil && recOf(sl.Value) != want:
			return nil, fmt.Errorf("get %s/%s: %+v, model %+v", t.name, k, recOf(sl.Value), want)
		case sl != nil && sl.Key != k:
			return nil, fmt.Errorf("get %s/%s: slot key %q", t.name, k, sl.Key)
		}
		if !cached && wasAbsent {
			st.absentMisses++
		}
		return sl, nil
	}
	// committedKey compares the committed database with the model.
	committedKey := func(ti int, k string) error {
		v, closer, err := s.db.Get(RecordKey(nil, modelTables[ti], k))
		want, ok := committed[ti][k]
		if errors.Is(err, pebble.ErrNotFound) {
			if ok {
				return fmt.Errorf("committed %s/%s: absent, model has %+v", modelTables[ti], k, want)
			}
			return nil
		}
		if err != nil {
			return err
		}
		defer closer.Close()
		d, err := decodeTV(v)
		if err != nil {
			return err
		}
		if !ok || recOf(d) != want {
			return fmt.Errorf("committed %s/%s: %+v, model %+v (present %v)", modelTables[ti], k, recOf(d), want, ok)
		}
		return nil
	}
	committedAll := func() error {
		for ti, name := range modelTables {
			got := storedRecordsErr(s.db, name)
			if got.err != nil {
				return got.err
			}
			if !maps.Equal(got.m, committed[ti]) {
				for _, k := range keys {
					if err := committedKey(ti, k); err != nil {
						return err
					}
				}
				return fmt.Errorf("committed table %s holds %d records, model %d", name, len(got.m), len(committed[ti]))
			}
		}
		return nil
	}

	for op := 0; op < c.ops; op++ {
		ti := r.IntN(len(modelTables))
		t := ts[ti]
		k := keys[r.IntN(len(keys))]
		evBefore := t.evictions
		switch p := r.Float64(); {
		case p < 0.30:
			if _, err := get(ti, k); err != nil {
				return st, fmt.Errorf("op %d: %w", op, err)
			}
		case p < 0.62:
			sl, err := get(ti, k)
			if err != nil {
				return st, fmt.Errorf("op %d: %w", op, err)
			}
			clock += r.Int64N(50)
			if sl == nil {
				v := rec{Last: clock, N: 1, Pad: r.IntN(200)}
				t.Insert(k, v.value())
				cur[ti][k] = v
			} else {
				// Event times may arrive out of order; LastTime is the
				// newest applied.
				sl.Value.Last = max(sl.Value.Last, clock-r.Int64N(100))
				sl.Value.N++
				sl.Value.Pad = bytes.Repeat([]byte{byte(sl.Value.N)}, r.IntN(200))
				t.Touch(sl)
				cur[ti][k] = recOf(sl.Value)
			}
		case p < 0.72:
			found, err := t.Delete(k)
			if err != nil {
				return st, fmt.Errorf("op %d: delete %s/%s: %w", op, t.name, k, err)
			}
			if _, ok := cur[ti][k]; ok != found {
				return st, fmt.Errorf("op %d: delete %s/%s reported %v, model %v", op, t.name, k, found, ok)
			}
			delete(cur[ti], k)
		case p < 0.75:
			if int(s.pending.Count())+len(s.spill.m) > 1 {
				st.dirtyStaged++
			}
			mark = Mark{Seen: uint64(op), Resume: uint64(op) - uint64(r.IntN(op+1)), Watermark: clock, Cursor: fmt.Appendf(nil, "c%d", op)}
			if err := s.Commit(mark); err != nil {
				return st, fmt.Errorf("op %d: commit: %w", op, err)
			}
			st.commits++
			for i := range cur {
				committed[i] = maps.Clone(cur[i])
			}
			if err := committedAll(); err != nil {
				return st, fmt.Errorf("op %d: after commit: %w", op, err)
			}
		case p < 0.75+c.reopenP:
			for _, t := range ts {
				st.evictions += int(t.evictions)
			}
			if err := s.Close(); err != nil {
				return st, fmt.Errorf("op %d: close: %w", op, err)
			}
			if err := open(); err != nil {
				return st, fmt.Errorf("op %d: reopen: %w", op, err)
			}
			st.reopens++
			if m := s.Mark(); m.Seen != mark.Seen || m.Resume != mark.Resume || m.Watermark != mark.Watermark || !bytes.Equal(m.Cursor, mark.Cursor) {
				return st, fmt.Errorf("op %d: reopened mark %+v, committed %+v", op, m, mark)
			}
			// Uncommitted changes are gone.
			for i := range cur {
				cur[i] = maps.Clone(committed[i])
			}
			for i := range ts {
				for _, k := range keys {
					if _, err := get(i, k); err != nil {
						return st, fmt.Errorf("op %d: after reopen: %w", op, err)
					}
				}
			}
			continue
		case p < 0.751+c.reopenP:
			for i := range ts {
				for _, k := range keys {
					if _, err := get(i, k); err != nil {
						return st, fmt.Errorf("op %d: full check: %w", op, err)
					}
				}
			}
		default:
			if _, err := get(ti, k); err != nil {
				return st, fmt.Errorf("op %d: %w", op, err)
			}
		}
		if t.evictions > evBefore && s.Err() != nil {
			return st, fmt.Errorf("op %d: eviction failed the store: %w", op, s.Err())
		}
		if len(ts[0].slots)+len(ts[1].slots) < 50 || op%16 == 0 {
			if err := checkCacheInvariants(s); err != nil {
				return st, fmt.Errorf("op %d: %w", op, err)
			}
		}
		if err := committedKey(ti, k); err != nil {
			return st, fmt.Errorf("op %d: %w", op, err)
		}
		if c.sabotage != nil {
			c.sabotage(ts)
		}
	}
	for _, t := range ts {
		st.evictions += int(t.evictions)
	}
	return st, nil
}

func TestCacheMatchesModel(t *testing.T) {
	t.Parallel()
	seeds, ops, reopenP := uint64(3), 12_000, 0.002
	if raceEnabled {
		seeds, ops, reopenP = 1, 10_000, 0.001
	}
	for _, c := range []struct {
		name       string
		cacheBytes int64
	}{
		// A handful of slots: CLOCK evicts on nearly every insert, and
		// most evictions are of dirty entries staged in the pending batch.
		{"tiny", 2_000},
		// Most of the key space fits: the knownAbsent shortcut serves
		// misses for long stretches before the first eviction.
		{"roomy", 60_000},
	} {
		for seed := uint64(1); seed <= seeds; seed++ {
			t.Run(fmt.Sprintf("%s/seed=%d", c.name, seed), func(t *testing.T) {
				t.Parallel()
				st, err := modelRun{seed: seed, ops: ops, keys: 300, cacheBytes: c.cacheBytes, reopenP: reopenP}.run()
				if err != nil {
					t.Fatal(err)
				}
				t.Logf("%+v", st)
				if st.evictions == 0 || st.absentMisses < 10 || st.reopens == 0 || st.commits == 0 {
					t.Fatalf("run did not cover eviction, knownAbsent misses, reopen and commit: %+v", st)
				}
				if c.name == "tiny" && st.dirtyStaged == 0 {
					t.Fatalf("no commit found dirty evictions staged: %+v", st)
				}
			})
		}
	}
}

// TestCacheModelCatchesWrongAbsence checks the checker: a table that keeps
// claiming knownAbsent after a capacity eviction reports an evicted key as
// absent, and the model run must notice.
func TestCacheModelCatchesWrongAbsence(t *testing.T) {
	_, err := modelRun{seed: 7, ops: 12_000, keys: 300, cacheBytes: 2_000, reopenP: 0.003,
		sabotage: func(ts []*Table[*tv]) {
			for _, t := range ts {
				if t.evictions > 0 {
					t.knownAbsent = true
				}
			}
		},
	}.run()
	if err == nil || !strings.Contains(err.Error(), "absent, model has") {
		t.Fatalf("sabotaged knownAbsent not caught: %v", err)
	}
}

// TestKnownAbsentClearedByEviction pins the shortcut's exit on the
// smallest case: a key committed and then evicted for capacity is found
// again, from the committed database and from the pending batch.
func TestKnownAbsentClearedByEviction(t *testing.T) {
	for _, commitFirst := range []bool{true, false} {
		t.Run(fmt.Sprintf("committed=%v", commitFirst), func(t *testing.T) {
			s := mustOpen(t, Options{CacheBytes: 400})
			defer s.Close()
			tb := NewTable(s, "t", 0, decodeTV)
			if !tb.knownAbsent {
				t.Fatal("new table not knownAbsent")
			}
			if sl, err := tb.Get("x"); sl != nil || err != nil {
				t.Fatalf("get on empty table: %v, %v", sl, err)
			}
			tb.Insert("x", rec{Last: 1, N: 1, Pad: 100}.value())
			if commitFirst {
				if err := s.Commit(Mark{}); err != nil {
					t.Fatal(err)
				}
			}
			// Two more entries push "x" out (its ref bit costs it one pass
			// of the hand).
			tb.Insert("y", rec{Last: 2, N: 1, Pad: 100}.value())
			tb.Insert("z", rec{Last: 3, N: 1, Pad: 100}.value())
			if cached := tb.lookup("x") != nil; cached {
				t.Fatal("x still cached; test needs a smaller budget")
			}
			if tb.knownAbsent {
				t.Fatal("knownAbsent survived a capacity eviction")
			}
			sl, err := tb.Get("x")
			if err != nil || sl == nil || recOf(sl.Value) != (rec{Last: 1, N: 1, Pad: 100}) {
				t.Fatalf("evicted x: %v, %v", sl, err)
			}
		})
	}
}

// TestKnownAbsentStaysAfterDelete: deleting, expiring or never having a
// key keeps the shortcut (nothing left the cache for capacity).
func TestKnownAbsentStaysAfterDelete(t *testing.T) {
	s := mustOpen(t, Options{})
	defer s.Close()
	tb := NewTable(s, "t", 100, decodeTV)
	tb.Insert("x", rec{Last: 1, N: 1}.value())
	tb.Insert("y", rec{Last: 1000, N: 1}.value())
	if _, err := s.Sweep(500); err != nil { // x expires while dirty
		t.Fatal(err)
	}
	if err := s.Commit(Mark{}); err != nil {
		t.Fatal(err)
	}
	if found, err := tb.Delete("y"); !found || err != nil {
		t.Fatalf("delete y: %v %v", found, err)
	}
	if !tb.knownAbsent {
		t.Fatal("knownAbsent cleared without a capacity eviction")
	}
	_, missesBefore, _ := tb.CacheStats()
	for _, k := range []string{"x", "y", "never"} {
		if sl, err := tb.Get(k); sl != nil || err != nil {
			t.Fatalf("get %s: %v %v", k, sl, err)
		}
	}
	if _, misses, _ := tb.CacheStats(); misses != missesBefore+3 {
		t.Fatalf("misses %d, want %d", misses, missesBefore+3)
	}
}

// A slot is allocated per cached entity: keep it in the 64-byte size
// class (see the field order in Slot).
func TestSlotSize(t *testing.T) {
	if n := unsafe.Sizeof(Slot[*tv]{}); n > 64 {
		t.Fatalf("Slot is %d bytes, want at most 64", n)
	}
}
