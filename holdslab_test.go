package tallyward

import (
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
)

// TestHoldSlabReuse holds and releases events in a disorderly order (a
// sliding hold of up to three chunks, released mostly oldest first) and
// checks every event against what was held when it leaves: a chunk
// reused while one of its events is still held would overwrite it. Then
// a steady state of holding and releasing allocates nothing.
func TestHoldSlabReuse(t *testing.T) {
	var s holdSlab[string]
	rng := rand.New(rand.NewPCG(4, 4))
	in := func(seq uint64) inputs {
		return inputs{t: int64(seq), keys: []string{fmt.Sprint("k", seq), ""}, on: []bool{seq%2 == 0, true, false},
			v: []float64{float64(seq), -1, 0}, item: []uint64{seq, seq * 3, 7}}
	}
	check := func(h *held[string]) {
		want := in(h.seq)
		if h.e != fmt.Sprint("e", h.seq) || h.tie != h.seq+1 || h.in.t != want.t ||
			!slices.Equal(h.in.keys, want.keys) || !slices.Equal(h.in.on, want.on) ||
			!slices.Equal(h.in.v, want.v) || !slices.Equal(h.in.item, want.item) {
			t.Fatalf("event %d changed while held: %+v", h.seq, h)
		}
	}
	var live []*held[string]
	for seq := range uint64(20 * chunkEvents) {
		x := in(seq)
		live = append(live, s.hold(seq, seq+1, fmt.Sprint("e", seq), &x))
		for len(live) > 0 && (len(live) > 3*chunkEvents || rng.IntN(3) == 0) {
			i := min(rng.IntN(4), len(live)-1) // mostly the oldest
			check(live[i])
			s.release(live[i])
			live = slices.Delete(live, i, i+1)
		}
	}
	for _, h := range live {
		check(h)
		s.release(h)
	}
	x := in(1)
	allocs := testing.AllocsPerRun(10, func() {
		var hs []*held[string]
		for seq := range uint64(3 * chunkEvents) {
			hs = append(hs, s.hold(seq, seq+1, "e", &x))
			if len(hs) > chunkEvents/2 {
				s.release(hs[0])
				hs = hs[1:]
			}
		}
		for _, h := range hs {
			s.release(h)
		}
	})
	// The scratch slice of pointers above grows; the slab itself must not
	// allocate once its spares exist.
	if allocs > 20 {
		t.Fatalf("%.0f allocations per %d holds: chunks are not reused", allocs, 3*chunkEvents)
	}
}
