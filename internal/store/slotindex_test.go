package store

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"github.com/cockroachdb/pebble/v2/vfs"
)

// TestSlotIndexMatchesMap: the slot index against a Go map, the brute
// reference, over random adds and swap-removes as Table.link and
// Table.drop make them, with phases that grow the index, churn it at a
// steady size (deletions shift entries back) and empty it (shrinking), in
// with real tags and with tags narrowed to 64 values (long runs of
// entries that wrap around the end and share homes): every key's lookup, present
// or absent, by string and by bytes, agrees with the map, and the entry
// counts agree with the entries.
func TestSlotIndexMatchesMap(t *testing.T) {
	for _, tags := range []uint64{idxMask, 63} {
		t.Run(fmt.Sprintf("tags=%d", tags), func(t *testing.T) { testSlotIndex(t, tags) })
	}
}

func testSlotIndex(t *testing.T, tags uint64) {
	r := rand.New(rand.NewPCG(7, tags))
	x := newSlotIndex()
	x.tagMask = tags
	var slots []*Slot[*tv]
	ref := map[string]*Slot[*tv]{}
	keys := make([]string, 5000)
	for i := range keys {
		keys[i] = fmt.Sprintf("k%d", i)
	}
	add := func(k string) {
		sl := &Slot[*tv]{Key: k, idx: int32(len(slots))}
		x.add(k, len(slots))
		slots = append(slots, sl)
		ref[k] = sl
	}
	drop := func(sl *Slot[*tv]) {
		x.remove(sl.Key, int(sl.idx))
		last := slots[len(slots)-1]
		if last != sl {
			x.move(last.Key, int(last.idx), int(sl.idx))
		}
		slots[sl.idx] = last
		last.idx = sl.idx
		slots = slots[:len(slots)-1]
		delete(ref, sl.Key)
	}
	check := func(step int) {
		t.Helper()
		for _, k := range keys {
			want := ref[k]
			if got := getSlot(&x, slots, k); got != want {
				t.Fatalf("step %d: lookup %q = %v, want %v", step, k, got, want)
			}
			if got := getSlotBytes(&x, slots, []byte(k)); got != want {
				t.Fatalf("step %d: lookup of bytes %q = %v, want %v", step, k, got, want)
			}
		}
		live := 0
		for _, e := range x.ents {
			if e != 0 {
				live++
			}
		}
		if live != len(ref) || x.n != len(ref) {
			t.Fatalf("step %d: %d entries, count %d, %d keys", step, live, x.n, len(ref))
		}
		if len(x.ents) > minIndexLen && len(ref)*8 < len(x.ents) {
			t.Fatalf("step %d: %d entries for %d keys: not shrunk", step, len(x.ents), len(ref))
		}
	}
	// Phases: grow to most keys, churn at a steady size, drain to
	// nothing, grow again.
	phases := []struct{ steps, addPct int }{{6000, 90}, {20000, 50}, {8000, 5}, {3000, 80}}
	step := 0
	for _, ph := range phases {
		for range ph.steps {
			step++
			if r.IntN(100) < ph.addPct || len(slots) == 0 {
				k := keys[r.IntN(len(keys))]
				if ref[k] == nil {
					add(k)
				}
			} else {
				drop(slots[r.IntN(len(slots))])
			}
			if step%997 == 0 {
				check(step)
			}
		}
		check(step)
	}
}

// TestHintsFindTheSlot follows the hint chain (HintIndex, HintPos,
// HintSlot) for cached keys while the table inserts, evicts and deletes:
// the chain must reach the key's own slot when its first tag match is
// the key's, and never anything but a slot of the table (or nothing).
func TestHintsFindTheSlot(t *testing.T) {
	s := mustOpen(t, Options{FS: vfs.NewMem(), CacheBytes: 40 << 10})
	defer s.Close()
	tb := NewTable(s, "t", 0, decodeTV)
	r := rand.New(rand.NewPCG(3, 4))
	found := 0
	for i := range 20_000 {
		key := fmt.Sprintf("k%d", r.IntN(2_000))
		if r.IntN(10) == 0 {
			if _, err := tb.Delete(key); err != nil {
				t.Fatal(err)
			}
		} else if sl, _ := tb.Get(key); sl == nil {
			tb.Insert(key, rec{Last: int64(i), N: 1}.value())
		}
		probe := fmt.Sprintf("k%d", r.IntN(2_000))
		sl := tb.HintSlot(tb.HintPos(tb.HintIndex(probe)))
		want := tb.lookup(probe)
		switch {
		case sl == nil && want != nil:
			t.Fatalf("step %d: hints found nothing for cached %q", i, probe)
		case sl != nil && (int(sl.idx) >= len(tb.slots) || tb.slots[sl.idx] != sl):
			t.Fatalf("step %d: hints reached a slot not in the table", i)
		case sl != nil && sl == want:
			found++
		}
	}
	if found == 0 {
		t.Fatal("the hints never reached a cached key's slot")
	}
}
