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

// An account that signs in about four times an hour, then nine times in
// ten minutes: the surge ratio against its own one-day decayed baseline.
func ExampleSurge() {
	s, err := window.NewSurge(window.SurgeSpec{Window: 10 * time.Minute, HalfLife: 24 * time.Hour, Resolution: time.Minute})
	if err != nil {
		panic(err)
	}
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	fmt.Printf("new: %.2f\n", s.RatioAt(t0))
	t := t0
	for range 4 * 24 * 7 { // a week at the usual pace
		s.Add(t)
		t += int64(15 * time.Minute)
	}
	fmt.Printf("usual: %.2f\n", s.RatioAt(t-int64(15*time.Minute)))
	for i := range 9 {
		s.Add(t + int64(i)*int64(time.Minute))
	}
	fmt.Printf("burst: %.2f\n", s.RatioAt(t+int64(9*time.Minute)))
	// "usual" is above 1 because the asking event counts itself: one event
	// in ten minutes against a baseline of 2/3.
	// Output:
	// new: 1.00
	// usual: 1.20
	// burst: 5.88
}
