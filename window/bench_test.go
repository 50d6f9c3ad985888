package window

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// Run: go test -run '^$' -bench . -benchmem -count 10 ./window/ > new.txt
// and compare two runs with: benchstat old.txt new.txt

const (
	second = int64(1e9)
	minute = 60 * second
	hour   = 60 * minute
	t0     = int64(1_700_000_000) * second // an arbitrary 2023 instant
)

// steadyTimes returns n event times starting at t0, mean gap `gap`, with a
// small disorder (within `disorder`), from a fixed seed.
func steadyTimes(n int, gap, disorder int64) []int64 {
	rng := rand.New(rand.NewPCG(1, 2))
	ts := make([]int64, n)
	t := t0
	for i := range ts {
		t += 1 + rng.Int64N(2*gap)
		ts[i] = t - rng.Int64N(disorder+1)
	}
	return ts
}

var sinkU uint64

func BenchmarkSlidingCount(b *testing.B) {
	spec := SlidingSpec{Window: hour, Resolution: minute, Horizon: 5 * second}
	ts := steadyTimes(1<<16, second, 5*second)
	b.Run("Add", func(b *testing.B) {
		c := NewSlidingCount(spec)
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			c.Add(ts[i&(len(ts)-1)] + int64(i>>16)*hour*24*365)
			i++
		}
	})
	b.Run("CountAt", func(b *testing.B) {
		c := NewSlidingCount(spec)
		for _, t := range ts[:4000] {
			c.Add(t)
		}
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			sinkU += c.CountAt(ts[3999] - int64(i&1023)*second)
			i++
		}
	})
	for _, n := range []int{10, 100, 1000} {
		b.Run(fmt.Sprintf("Encode/events=%d", n), func(b *testing.B) {
			c := NewSlidingCount(spec)
			for _, t := range steadyTimes(n, hour/int64(n), 5*second) {
				c.Add(t)
			}
			buf, _ := c.AppendBinary(nil)
			b.ReportAllocs()
			for b.Loop() {
				buf, _ = c.AppendBinary(buf[:0])
			}
			b.ReportMetric(float64(len(buf)), "bytes/entity")
		})
	}
}
