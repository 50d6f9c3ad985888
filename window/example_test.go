package window_test

import (
	"fmt"
	"time"

	"github.com/tallyward/tallyward/window"
)

func ExampleSlidingCount() {
	min := int64(time.Minute)
	c := window.NewSlidingCount(window.SlidingSpec{Window: 60 * min, Resolution: min, Horizon: 5 * int64(time.Second)})
	base := int64(1_700_000_040) * int64(time.Second) // on a minute boundary
	for i := range int64(5) {
		c.Add(base + i*10*min)
	}
	fmt.Println(c.CountAt(base + 40*min))
	fmt.Println(c.CountAt(base + 75*min))
	b, _ := c.AppendBinary(nil)
	fmt.Println(len(b), "bytes")
	// Output:
	// 5
	// 3
	// 23 bytes
}

func ExampleDecayed() {
	// The forward-decay worked example: half-life 10, v = 1 at 0 and 10.
	d := window.NewDecayed(window.DecaySpec{HalfLife: 10, Horizon: 100})
	d.Add(10, 1)
	d.Add(0, 1)
	fmt.Println(d.SumAt(20))
	// Output: 0.75
}

func ExampleVelocity() {
	min := int64(time.Minute)
	v := window.NewVelocity(window.VelocitySpec{Short: 5 * min, Long: 60 * min, Resolution: min})
	fmt.Println(v.RatioAt(0)) // a new entity
	for range 4 {
		v.Add(59 * min)
	}
	fmt.Printf("%.3f\n", v.RatioAt(59*min))
	// Output:
	// 1
	// 3.750
}
