package window

import (
	"math/rand/v2"
	"testing"
	"time"
)

// TestHintMemoryChangesNothing: HintMemory, called before every add and
// query through a sliding sum's every state (empty, panes inside the
// value, panes and raw events spilled outside it, emptied by a jump of
// time), never faults and leaves every answer equal to a twin's that is
// never hinted.
func TestHintMemoryChangesNothing(t *testing.T) {
	spec := SlidingSpec{Window: time.Minute, Resolution: time.Second, Horizon: 5 * time.Second}
	hinted, err := NewSlidingSum(spec)
	if err != nil {
		t.Fatal(err)
	}
	plain, _ := NewSlidingSum(spec)
	rng := rand.New(rand.NewPCG(5, 5))
	now := int64(1_000_000e9)
	hinted.HintMemory()
	for i := range 5000 {
		switch {
		case i%1000 == 999:
			now += int64(time.Hour) // every pane and raw event leaves
		default:
			now += rng.Int64N(int64(400 * time.Millisecond))
		}
		at := now - rng.Int64N(int64(3*time.Second))
		v := float64(rng.IntN(100))
		hinted.HintMemory()
		if a, b := hinted.Add(at, v), plain.Add(at, v); a != b {
			t.Fatalf("event %d: add %v, twin %v", i, a, b)
		}
		hinted.HintMemory()
		if a, b := hinted.SumAt(now), plain.SumAt(now); a != b {
			t.Fatalf("event %d: sum %v, twin %v", i, a, b)
		}
	}
}
