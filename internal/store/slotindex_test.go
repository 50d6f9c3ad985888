package store

import (
	"fmt"
	"math/rand/v2"
	"testing"
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
