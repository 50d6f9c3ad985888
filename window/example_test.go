package window_test

import (
	"fmt"
	"time"

	"github.com/tallyward/tallyward/window"
)

func ExampleSlidingCount() {
	c, err := window.NewSlidingCount(window.SlidingSpec{Window: time.Hour, Resolution: time.Minute, Horizon: 5 * time.Second})
	if err != nil {
		panic(err)
	}
	min := int64(time.Minute)
	base := time.Unix(1_700_000_040, 0).UnixNano() // on a minute boundary
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
	d, err := window.NewDecayed(window.DecaySpec{HalfLife: 10, Horizon: 100})
	if err != nil {
		panic(err)
	}
	d.Add(10, 1)
	d.Add(0, 1)
	fmt.Println(d.SumAt(20))
	// Output: 0.75
}

func ExampleVelocity() {
	v, err := window.NewVelocity(window.VelocitySpec{Short: 5 * time.Minute, Long: time.Hour, Resolution: time.Minute})
	if err != nil {
		panic(err)
	}
	min := int64(time.Minute)
	fmt.Println(v.RatioAt(0)) // a new entity
	for range 4 {
		v.Add(59 * min)
	}
	fmt.Printf("%.3f\n", v.RatioAt(59*min))
	// Output:
	// 1
	// 3.750
}
