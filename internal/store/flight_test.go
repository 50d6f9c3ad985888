package store

import (
	"maps"
	"math/rand/v2"
	"testing"

	"github.com/cockroachdb/pebble/v2/vfs"
)

// TestCommitInFlight drives a table with a cache far smaller than its keys
// while commits are in flight: every read must see the newest value (a
// model map is the reference), every landed commit must hold exactly the
// model as of its freeze, and a reopen must find the last one. Run both
// commit paths (batch and ingested table), with and without a ttl: with
// one, every landed commit's expiry index must also hold exactly one entry
// per record, in the bucket of its newest time (the frozen records' index
// moves are made by whichever side encodes them).
func TestCommitInFlight(t *testing.T) {
	for _, c := range []struct{ threshold, ttl int }{{-1, 0}, {1, 0}, {-1, 1600}, {1, 1600}} {
		threshold := c.threshold
		r := rand.New(rand.NewPCG(7, uint64(threshold+2+c.ttl)))
		fs := vfs.NewMem()
		opts := Options{Dir: "db", FS: fs, CacheBytes: 4 << 10, IngestThreshold: threshold}
		s := mustOpen(t, opts)
		tb := NewTable(s, "t", int64(c.ttl), decodeTV)
		model := map[string]rec{}
		var frozen map[string]rec // the model at the freeze of the commit in flight
		check := func(key string) {
			t.Helper()
			sl, err := tb.Get(key)
			if err != nil {
				t.Fatal(err)
			}
			want, ok := model[key]
			switch {
			case sl == nil && ok:
				t.Fatalf("threshold %d: %q not found, want %+v", threshold, key, want)
			case sl != nil && !ok:
				t.Fatalf("threshold %d: %q found, want none", threshold, key)
			case sl != nil && recOf(sl.Value) != want:
				t.Fatalf("threshold %d: %q = %+v, want %+v", threshold, key, recOf(sl.Value), want)
			}
		}
		for i := range 20_000 {
			key := string(rune('a'+r.IntN(26))) + string(rune('a'+r.IntN(26)))
			switch op := r.IntN(100); {
			case op < 60:
				check(key)
				sl, _ := tb.Get(key)
				if sl == nil {
					m := rec{Last: int64(i), N: 1, Pad: r.IntN(40)}
					tb.Insert(key, m.value())
					model[key] = m
				} else {
					sl.Value.N++
					sl.Value.Last = int64(i)
					tb.Touch(sl)
					model[key] = recOf(sl.Value)
				}
			case op < 70:
				if _, err := tb.Delete(key); err != nil {
					t.Fatal(err)
				}
				delete(model, key)
			case op < 98:
				check(key)
			default:
				if frozen != nil {
					if err := s.Settle(); err != nil {
						t.Fatal(err)
					}
					if got := storedRecords(t, s.DB(), "t"); !maps.Equal(got, frozen) {
						t.Fatalf("threshold %d: landed commit holds %d records, model at freeze %d", threshold, len(got), len(frozen))
					}
					checkIndex(t, s.DB(), "t", int64(c.ttl))
				}
				if err := s.CommitAsync(Mark{Seen: uint64(i), Resume: uint64(i)}); err != nil {
					t.Fatal(err)
				}
				frozen = maps.Clone(model)
			}
			if err := checkCacheInvariants(s); err != nil {
				t.Fatal(err)
			}
		}
		if err := s.Commit(Mark{Seen: 20_000, Resume: 20_000}); err != nil {
			t.Fatal(err)
		}
		if err := s.Close(); err != nil {
			t.Fatal(err)
		}
		s = mustOpen(t, opts)
		if got := storedRecords(t, s.DB(), "t"); !maps.Equal(got, model) {
			t.Fatalf("threshold %d: reopened store holds %d records, model %d", threshold, len(got), len(model))
		}
		checkIndex(t, s.DB(), "t", int64(c.ttl))
		if s.Mark().Seen != 20_000 {
			t.Fatalf("mark %+v", s.Mark())
		}
		s.Close()
	}
}
