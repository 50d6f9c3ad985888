package tallyward

import (
	"errors"
	"runtime"
	"testing"

	"github.com/tallyward/tallyward/sketch"
)

// A stored Frequency summary written under other Count-Min parameters is
// refused before its cells are allocated: the blob names its own width
// and depth, and a damaged or foreign one could ask for 32 MiB.
func TestFrequencyRefusesOtherParamsBeforeAllocating(t *testing.T) {
	big, err := sketch.NewCountMin(sketch.CountMinParams{Epsilon: 1e-5, Delta: 1e-3})
	if err != nil {
		t.Fatal(err)
	}
	blob, _ := big.AppendBinary(nil)
	cm, err := sketch.NewCountMin(Frequency{}.params())
	if err != nil {
		t.Fatal(err)
	}
	s := &frequencySummary{cm}
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	err = s.UnmarshalBinary(blob)
	runtime.ReadMemStats(&after)
	if !errors.Is(err, errTailed) {
		t.Fatalf("UnmarshalBinary = %v, want the parameter mismatch", err)
	}
	if n := after.TotalAlloc - before.TotalAlloc; n > 1<<20 {
		t.Fatalf("refusing the blob allocated %d bytes", n)
	}
}
