package sketch_test

import (
	"fmt"
	"time"

	"github.com/tallyward/tallyward/sketch"
)

// Distinct accounts seen on one device in the last 24 hours, with one-hour
// panes and a 5-second allowed disorder.
func ExampleDistinct() {
	d, err := sketch.NewDistinct(sketch.DistinctSpec{Window: 24 * time.Hour, Resolution: time.Hour, Horizon: 5 * time.Second})
	if err != nil {
		panic(err)
	}
	const hour = int64(time.Hour)
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	d.Add(t0, sketch.HashString("acct-a"))
	d.Add(t0+2*hour, sketch.HashString("acct-b"))
	fmt.Println(d.DistinctAt(t0 + 2*hour))
	d.Add(t0+3*hour, sketch.HashString("acct-a"))
	// Later queries: acct-a's first pane leaves the window after 24 h, its
	// second after 27 h.
	fmt.Println(d.DistinctAt(t0+3*hour), d.DistinctAt(t0+25*hour), d.DistinctAt(t0+27*hour))
	// Output:
	// 2
	// 2 2 0
}

// Is this amount above the card's 95th percentile?
func ExampleQuantile() {
	q, _ := sketch.NewQuantile(sketch.QuantileParams{RelativeAccuracy: 0.01})
	for i := 1; i <= 100; i++ {
		q.Add(float64(i))
	}
	p95, _ := q.Value(0.95)
	fmt.Printf("p95 %.1f, 250 above: %v\n", p95, 250 > p95)
	// Output: p95 94.6, 250 above: true
}

// The share of the most frequent merchant for one card.
func ExampleTopK() {
	s, _ := sketch.NewTopK(sketch.TopKParams{Capacity: 8})
	for _, m := range []string{"m-1", "m-2", "m-1", "m-3", "m-1"} {
		s.Add(sketch.HashString(m), 1)
	}
	fmt.Printf("%.2f\n", s.TopShare())
	// Output: 0.60
}

// Distinct devices ever seen for one account, however long ago.
func ExampleDistinctEver() {
	d, err := sketch.NewDistinctEver(sketch.DistinctEverSpec{Horizon: 5 * time.Second})
	if err != nil {
		panic(err)
	}
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	day := int64(24 * time.Hour)
	d.Add(t0, sketch.HashString("device-a"))
	d.Add(t0+200*day, sketch.HashString("device-b"))
	d.Add(t0+400*day, sketch.HashString("device-a"))
	fmt.Println(d.DistinctAt(t0+400*day), d.Count())
	// Output: 2 3
}
