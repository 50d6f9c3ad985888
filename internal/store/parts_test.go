package store

import (
	"fmt"
	"math/rand/v2"
	"sync"
	"testing"
)

// TestPartsConcurrent drives the parts of two split tables from one
// goroutine each, with a budget small enough that every part evicts
// (staging into the shared spill) and reads evicted keys back, while
// commits cut at barriers between rounds. Each part's counts must equal
// a brute-force count of the increments its goroutine made, in the cache
// and after a reopen. Run under the race detector in CI.
func TestPartsConcurrent(t *testing.T) {
	const n, rounds, perRound, keys = 3, 6, 4000, 3000
	dir := t.TempDir()
	opts := Options{Dir: dir, CacheBytes: 64 << 10}
	s := mustOpen(t, opts)
	names := []string{"acct", "dev"}
	var tables [][]*Table[*tv]
	for _, name := range names {
		tables = append(tables, NewParts(s, name, 0, decodeTV, n, peekTV))
	}
	want := map[string]uint64{} // name/key -> count
	for r := range rounds {
		var wg sync.WaitGroup
		got := make([]map[string]uint64, n)
		for w := range n {
			got[w] = map[string]uint64{}
			wg.Add(1)
			go func() {
				defer wg.Done()
				rng := rand.New(rand.NewPCG(uint64(r), uint64(w)))
				for range perRound {
					ti := rng.IntN(len(names))
					key := fmt.Sprintf("k%d", rng.IntN(keys))
					if PartOf(key, n) != w {
						continue
					}
					tb := tables[ti][w]
					sl, err := tb.Get(key)
					if err != nil {
						t.Error(err)
						return
					}
					if sl == nil {
						sl = tb.Insert(key, &tv{Last: 1})
					}
					sl.Value.N++
					sl.Value.Last++
					tb.Touch(sl)
					got[w][names[ti]+"/"+key]++
				}
			}()
		}
		wg.Wait()
		for _, g := range got {
			for k, c := range g {
				want[k] += c
			}
		}
		if err := s.CommitAsync(Mark{Seen: uint64(r + 1)}); err != nil {
			t.Fatal(err)
		}
	}
	check := func(s *Store, tables [][]*Table[*tv], wantEvictions bool) {
		t.Helper()
		evicted := uint64(0)
		for ti, name := range names {
			for _, tb := range tables[ti] {
				_, _, ev := tb.CacheStats()
				evicted += ev
			}
			for k := range keys {
				key := fmt.Sprintf("k%d", k)
				sl, err := tables[ti][PartOf(key, n)].Get(key)
				if err != nil {
					t.Fatal(err)
				}
				var c uint64
				if sl != nil {
					c = sl.Value.N
				}
				if c != want[name+"/"+key] {
					t.Fatalf("%s/%s: count %d, brute force %d", name, key, c, want[name+"/"+key])
				}
			}
		}
		if wantEvictions && evicted == 0 {
			t.Fatal("no part evicted: the budget did not bind")
		}
		if err := checkCacheInvariants(s); err != nil {
			t.Fatal(err)
		}
	}
	check(s, tables, true)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s = mustOpen(t, opts)
	defer s.Close()
	if s.Mark().Seen != rounds {
		t.Fatalf("reopened at %d, want %d", s.Mark().Seen, rounds)
	}
	tables = nil
	for _, name := range names {
		tables = append(tables, NewParts(s, name, 0, decodeTV, n, peekTV))
	}
	check(s, tables, false)
}
