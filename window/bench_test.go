package window

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// Benchmarks on pre-generated, seeded inputs. Run
//
//	go test ./window/ -run '^$' -bench . -benchmem -count 10 > new.txt
//
// and compare two runs with benchstat old.txt new.txt.

const (
	second = 1_000_000_000 // untyped: a time (int64 ns) or a time.Duration
	minute = 60 * second
	hour   = 60 * minute
	t0     = int64(1_700_000_000) * second // an arbitrary instant in 2023
)

// steadyTimes returns n event times after t0 with mean gap `gap` and a
// disorder of up to `disorder`, from a fixed seed.
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

var (
	sinkU uint64
	sinkF float64
)

// benchAdd drives add over a long stream that keeps advancing; the stream
// is replayed shifted by a year per lap so time never goes back.
func benchAdd(b *testing.B, add func(t int64, v float64)) {
	ts := steadyTimes(1<<16, second, 5*second)
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		add(ts[i&(len(ts)-1)]+int64(i>>16)*365*24*hour, float64(i&63))
		i++
	}
}

// benchQuery fills an aggregate with an hour of events (one a second) and
// queries it at times spread over the last horizon and the past.
func benchQuery(b *testing.B, add func(t int64, v float64), query func(t int64)) {
	ts := steadyTimes(4000, second, 5*second)
	for i, t := range ts {
		add(t, float64(i&63))
	}
	last := ts[len(ts)-1]
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		query(last - int64(i&7)*second)
		i++
	}
}

var benchSpec = SlidingSpec{Window: hour, Resolution: minute, Horizon: 5 * second}

func BenchmarkAdd(b *testing.B) {
	b.Run("baseline-slice-append", func(b *testing.B) {
		s := make([]int64, 0, 1<<10)
		benchAdd(b, func(t int64, _ float64) {
			if len(s) == cap(s) {
				s = s[:0]
			}
			s = append(s, t)
		})
	})
	b.Run("SlidingCount", func(b *testing.B) {
		c := must(NewSlidingCount(benchSpec))
		benchAdd(b, func(t int64, _ float64) { c.Add(t) })
	})
	valued := []struct {
		name string
		mk   func(SlidingSpec) interface{ Add(int64, float64) bool }
	}{
		{"SlidingSum", func(s SlidingSpec) interface{ Add(int64, float64) bool } { return must(NewSlidingSum(s)) }},
		{"SlidingMin", func(s SlidingSpec) interface{ Add(int64, float64) bool } { return must(NewSlidingMin(s)) }},
		{"SlidingMax", func(s SlidingSpec) interface{ Add(int64, float64) bool } { return must(NewSlidingMax(s)) }},
		{"SlidingMean", func(s SlidingSpec) interface{ Add(int64, float64) bool } { return must(NewSlidingMean(s)) }},
	}
	for _, v := range valued {
		b.Run(v.name, func(b *testing.B) {
			a := v.mk(benchSpec)
			benchAdd(b, func(t int64, x float64) { a.Add(t, x) })
		})
	}
	b.Run("Decayed", func(b *testing.B) {
		d := must(NewDecayed(DecaySpec{HalfLife: hour, Horizon: 5 * second}))
		benchAdd(b, func(t int64, v float64) { d.Add(t, v) })
	})
	b.Run("Velocity", func(b *testing.B) {
		v := must(NewVelocity(VelocitySpec{Short: 5 * minute, Long: hour, Resolution: minute, Horizon: 5 * second}))
		benchAdd(b, func(t int64, _ float64) { v.Add(t) })
	})
	b.Run("Recency", func(b *testing.B) {
		r := must(NewRecency(RecencySpec{Gap: 30 * minute, Horizon: 5 * second}))
		benchAdd(b, func(t int64, _ float64) { r.Add(t) })
	})
	b.Run("Surge", func(b *testing.B) {
		s := must(NewSurge(SurgeSpec{Window: 5 * minute, HalfLife: 24 * hour, Resolution: minute, Horizon: 5 * second}))
		benchAdd(b, func(t int64, _ float64) { s.Add(t) })
	})
}

func BenchmarkQuery(b *testing.B) {
	b.Run("SlidingCount.CountAt", func(b *testing.B) {
		c := must(NewSlidingCount(benchSpec))
		benchQuery(b, func(t int64, _ float64) { c.Add(t) }, func(t int64) { sinkU += c.CountAt(t) })
	})
	b.Run("SlidingMean.MeanAt", func(b *testing.B) {
		c := must(NewSlidingMean(benchSpec))
		benchQuery(b, func(t int64, v float64) { c.Add(t, v) }, func(t int64) { sinkF += c.MeanAt(t) })
	})
	b.Run("SlidingMax.MaxAt", func(b *testing.B) {
		c := must(NewSlidingMax(benchSpec))
		benchQuery(b, func(t int64, v float64) { c.Add(t, v) }, func(t int64) { sinkF += c.MaxAt(t) })
	})
	b.Run("Decayed.VarianceAt", func(b *testing.B) {
		d := must(NewDecayed(DecaySpec{HalfLife: hour, Horizon: 5 * second}))
		benchQuery(b, func(t int64, v float64) { d.Add(t, v) }, func(t int64) { sinkF += d.VarianceAt(t) })
	})
	b.Run("Velocity.RatioAt", func(b *testing.B) {
		v := must(NewVelocity(VelocitySpec{Short: 5 * minute, Long: hour, Resolution: minute, Horizon: 5 * second}))
		benchQuery(b, func(t int64, _ float64) { v.Add(t) }, func(t int64) { sinkF += v.RatioAt(t) })
	})
	b.Run("Surge.RatioAt", func(b *testing.B) {
		s := must(NewSurge(SurgeSpec{Window: 5 * minute, HalfLife: 24 * hour, Resolution: minute, Horizon: 5 * second}))
		benchQuery(b, func(t int64, _ float64) { s.Add(t) }, func(t int64) { sinkF += s.RatioAt(t) })
	})
	b.Run("Recency.SessionCountAt", func(b *testing.B) {
		r := must(NewRecency(RecencySpec{Gap: 30 * minute, Horizon: 5 * second}))
		benchQuery(b, func(t int64, _ float64) { r.Add(t) }, func(t int64) { sinkU += r.SessionCountAt(t) })
	})
}

// BenchmarkEncode reports encoded bytes per entity at typical loads: n
// events spread over the last hour, horizon 5 s.
func BenchmarkEncode(b *testing.B) {
	type mk func() (codec, func(int64))
	aggs := []struct {
		name string
		mk   mk
	}{
		{"SlidingCount", func() (codec, func(int64)) {
			c := must(NewSlidingCount(benchSpec))
			return c, func(t int64) { c.Add(t) }
		}},
		{"SlidingSum", func() (codec, func(int64)) {
			c := must(NewSlidingSum(benchSpec))
			return c, func(t int64) { c.Add(t, 12.5) }
		}},
		{"Decayed", func() (codec, func(int64)) {
			c := must(NewDecayed(DecaySpec{HalfLife: hour, Horizon: 5 * second}))
			return c, func(t int64) { c.Add(t, 12.5) }
		}},
		{"Recency", func() (codec, func(int64)) {
			c := must(NewRecency(RecencySpec{Gap: 30 * minute, Horizon: 5 * second}))
			return c, func(t int64) { c.Add(t) }
		}},
	}
	for _, a := range aggs {
		for _, n := range []int{1, 10, 100, 1000} {
			b.Run(fmt.Sprintf("%s/events=%d", a.name, n), func(b *testing.B) {
				c, add := a.mk()
				for _, t := range steadyTimes(n, hour/int64(2*n), 5*second) {
					add(t)
				}
				buf, _ := c.AppendBinary(nil)
				size := len(buf)
				b.ReportAllocs()
				for b.Loop() {
					buf, _ = c.AppendBinary(buf[:0])
				}
				b.ReportMetric(float64(size), "bytes/entity")
				if sz, ok := c.(interface{ SizeBytes() int }); ok {
					b.ReportMetric(float64(sz.SizeBytes()), "heap-bytes/entity")
				}
			})
		}
	}
}

func BenchmarkDecode(b *testing.B) {
	c := must(NewSlidingCount(benchSpec))
	for _, t := range steadyTimes(100, hour/200, 5*second) {
		c.Add(t)
	}
	buf, _ := c.AppendBinary(nil)
	d := must(NewSlidingCount(benchSpec))
	b.ReportAllocs()
	for b.Loop() {
		if err := d.UnmarshalBinary(buf); err != nil {
			b.Fatal(err)
		}
	}
}

// must returns x, failing the program on err: test specs are valid.
func must[T any](x T, err error) T {
	if err != nil {
		panic(err)
	}
	return x
}

// newest is the newest time of a non-empty aggregate.
func newest(a interface{ Newest() (int64, bool) }) int64 {
	t, _ := a.Newest()
	return t
}
