package sketch

// Benchmarks. Inputs are generated from fixed seeds before the timer.
// Compare runs with:
//
//	go test -run '^$' -bench . -count 8 ./sketch/ > new.txt
//	benchstat old.txt new.txt

import (
	"encoding/binary"
	"fmt"
	"math/bits"
	"math/rand/v2"
	"testing"

	"github.com/axiomhq/hyperloglog"

	"github.com/tallyward/tallyward/internal/sat"
)

var benchCards = []int{10, 1_000, 100_000, 10_000_000}

func benchHashes(n int, seed uint64) []uint64 {
	hs := make([]uint64, n)
	var buf [16]byte
	for i := range hs {
		binary.LittleEndian.PutUint64(buf[:], seed)
		binary.LittleEndian.PutUint64(buf[8:], uint64(i))
		hs[i] = Hash(buf[:])
	}
	return hs
}

// benchSpec: 1 h window of 1 min panes, 5 s horizon, default precision.
var benchSpec = DistinctSpec{Window: 3600 * sec, Resolution: 60 * sec, Horizon: 5 * sec}

const benchT0 = int64(1_760_000_000) * sec

// filledDistinct returns a Distinct holding n distinct items spread over
// the last half hour, and the time of the newest add.
func filledDistinct(tb testing.TB, spec DistinctSpec, n int) (*Distinct, int64) {
	d := mustDistinct(tb, spec)
	hs := benchHashes(n, 1)
	step := max(1800*sec/int64(n), 1)
	t := benchT0
	for _, h := range hs {
		d.Add(t, h)
		t += step
	}
	return d, t - step
}

var filledCache = map[int]*Distinct{}
var filledNewest = map[int]int64{}

func cachedDistinct(b *testing.B, n int) (*Distinct, int64) {
	if _, ok := filledCache[n]; !ok {
		filledCache[n], filledNewest[n] = filledDistinct(b, benchSpec, n)
	}
	blob, _ := filledCache[n].AppendBinary(nil)
	var d Distinct
	if err := d.UnmarshalBinary(blob); err != nil {
		b.Fatal(err)
	}
	return &d, filledNewest[n]
}

// benchStream adds one event per ms from hs, cycling, and when query is
// not nil asks for the count as of lag before each event's time.
func benchStream(b *testing.B, t int64, hs []uint64, add func(int64, uint64) bool, query func(int64) uint64, lag int64) {
	b.ReportAllocs()
	var sink uint64
	for i := 0; b.Loop(); i++ {
		t += 1_000_000
		add(t, hs[i%len(hs)])
		if query != nil {
			sink += query(t - lag)
		}
	}
	_ = sink
}

// BenchmarkDistinct: amortised Add on a stream whose window holds n
// distinct items; the per-event path (Add, then the count as of the
// event's time); and Add with a query at the edge of the Horizon, as a
// settled emission asks.
func BenchmarkDistinct(b *testing.B) {
	for _, mode := range []string{"add", "addquery", "addlagged"} {
		for _, n := range benchCards {
			b.Run(fmt.Sprintf("%s/n=%d", mode, n), func(b *testing.B) {
				hs := benchHashes(min(n, 1<<20), 2)
				d, t := cachedDistinct(b, n)
				switch mode {
				case "add":
					benchStream(b, t, hs, d.Add, nil, 0)
				case "addquery":
					benchStream(b, t, hs, d.Add, d.DistinctAt, 0)
				default:
					benchStream(b, t, hs, d.Add, d.DistinctAt, int64(benchSpec.Horizon)-1)
				}
			})
		}
	}
}

// benchEncode times AppendBinary and reports encoded and heap bytes.
func benchEncode(b *testing.B, e encoder) {
	b.ReportAllocs()
	var buf []byte
	for b.Loop() {
		buf, _ = e.AppendBinary(buf[:0])
	}
	b.ReportMetric(float64(len(buf)), "bytes/sketch")
	b.ReportMetric(float64(e.SizeBytes()), "heap-bytes")
}

// BenchmarkDistinctEncode reports encoded and heap bytes per summary.
func BenchmarkDistinctEncode(b *testing.B) {
	for _, n := range benchCards {
		b.Run(fmt.Sprintf("n=%d", n), func(b *testing.B) {
			d, _ := cachedDistinct(b, n)
			benchEncode(b, d)
		})
	}
}

func BenchmarkDistinctDecode(b *testing.B) {
	for _, n := range benchCards {
		b.Run(fmt.Sprintf("n=%d", n), func(b *testing.B) {
			d, _ := cachedDistinct(b, n)
			blob, _ := d.AppendBinary(nil)
			b.ReportAllocs()
			var c Distinct
			for b.Loop() {
				if err := c.UnmarshalBinary(blob); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// paneSketches is the design measured against sliding registers: one
// github.com/axiomhq/hyperloglog sketch per pane, merged at query time.
type paneSketches struct {
	res, k int64
	panes  map[int64]*hyperloglog.Sketch
}

func (s *paneSketches) add(t int64, h uint64) bool {
	p := sat.FloorDiv(t, s.res)
	sk := s.panes[p]
	if sk == nil {
		sk, _ = hyperloglog.NewSketch(defaultDistinctPrecision, true)
		s.panes[p] = sk
		delete(s.panes, p-s.k-1)
	}
	sk.InsertHash(h)
	return true
}

func (s *paneSketches) at(t int64) uint64 {
	p := sat.FloorDiv(t, s.res)
	var m hyperloglog.Sketch
	for q := p - s.k + 1; q <= p; q++ {
		if sk := s.panes[q]; sk != nil {
			_ = m.Merge(sk)
		}
	}
	return m.Estimate()
}

func (s *paneSketches) encodedBytes() int {
	n := 0
	for _, sk := range s.panes {
		blob, _ := sk.MarshalBinary()
		n += len(blob)
	}
	return n
}

// BenchmarkDesignPaneSketches measures per-pane axiomhq sketches on the
// same stream and window as BenchmarkDistinct add and addquery.
func BenchmarkDesignPaneSketches(b *testing.B) {
	for _, n := range benchCards[:3] {
		hs := benchHashes(n, 1)
		fill := func() (*paneSketches, int64) {
			s := &paneSketches{res: int64(benchSpec.Resolution), k: int64(benchSpec.Window) / int64(benchSpec.Resolution), panes: map[int64]*hyperloglog.Sketch{}}
			step := max(1800*sec/int64(n), 1)
			t := benchT0
			for _, h := range hs {
				s.add(t, h)
				t += step
			}
			return s, t
		}
		b.Run(fmt.Sprintf("add/n=%d", n), func(b *testing.B) {
			s, t := fill()
			benchStream(b, t, hs, s.add, nil, 0)
			b.ReportMetric(float64(s.encodedBytes()), "bytes/sketch")
		})
		b.Run(fmt.Sprintf("addquery/n=%d", n), func(b *testing.B) {
			s, t := fill()
			benchStream(b, t, hs, s.add, s.at, 0)
		})
	}
}

func BenchmarkCountMin(b *testing.B) {
	hs := benchHashes(1<<16, 5)
	b.Run("add", func(b *testing.B) {
		c := mustCM(b, CountMinParams{})
		b.ReportAllocs()
		for i := 0; b.Loop(); i++ {
			c.Add(hs[i&(1<<16-1)], 1)
		}
	})
	b.Run("estimate", func(b *testing.B) {
		c := mustCM(b, CountMinParams{})
		for _, h := range hs {
			c.Add(h, 1)
		}
		b.ReportAllocs()
		var sink uint64
		for i := 0; b.Loop(); i++ {
			sink += c.Estimate(hs[i&(1<<16-1)])
		}
		_ = sink
	})
	for _, n := range benchCards {
		b.Run(fmt.Sprintf("encode/n=%d", n), func(b *testing.B) {
			c := mustCM(b, CountMinParams{})
			rng := rand.New(rand.NewPCG(1, 1))
			for i := range n {
				c.Add(HashString(fmt.Sprint(i%max(n/4, 1), rng.IntN(2))), 1)
			}
			benchEncode(b, c)
		})
	}
}

func BenchmarkTopK(b *testing.B) {
	rng := rand.New(rand.NewPCG(6, 6))
	zipf := rand.NewZipf(rng, 1.2, 1, 1<<20)
	hs := make([]uint64, 1<<16)
	for i := range hs {
		hs[i] = HashString(fmt.Sprint(zipf.Uint64()))
	}
	b.Run("add", func(b *testing.B) {
		s := mustTopK(b, 32)
		b.ReportAllocs()
		for i := 0; b.Loop(); i++ {
			s.Add(hs[i&(1<<16-1)], 1)
		}
	})
	b.Run("top1share", func(b *testing.B) {
		s := mustTopK(b, 32)
		for _, h := range hs {
			s.Add(h, 1)
		}
		b.ReportAllocs()
		var sink float64
		for b.Loop() {
			sink += s.TopShare()
		}
		_ = sink
	})
	for _, n := range benchCards {
		b.Run(fmt.Sprintf("encode/n=%d", n), func(b *testing.B) {
			s := mustTopK(b, 32)
			for i := range n {
				s.Add(hs[i&(1<<16-1)], 1)
			}
			benchEncode(b, s)
		})
	}
}

func BenchmarkQuantile(b *testing.B) {
	rng := rand.New(rand.NewPCG(7, 7))
	xs := make([]float64, 1<<16)
	for i := range xs {
		xs[i] = rng.ExpFloat64() * 120
	}
	b.Run("add", func(b *testing.B) {
		s := mustQ(b, QuantileParams{})
		b.ReportAllocs()
		for i := 0; b.Loop(); i++ {
			s.Add(xs[i&(1<<16-1)])
		}
	})
	b.Run("p95", func(b *testing.B) {
		s := mustQ(b, QuantileParams{})
		for _, x := range xs {
			s.Add(x)
		}
		b.ReportAllocs()
		var sink float64
		for b.Loop() {
			v, _ := s.Value(0.95)
			sink += v
		}
		_ = sink
	})
	for _, n := range benchCards {
		b.Run(fmt.Sprintf("encode/n=%d", n), func(b *testing.B) {
			s := mustQ(b, QuantileParams{})
			for i := range n {
				s.Add(xs[i&(1<<16-1)])
			}
			benchEncode(b, s)
		})
	}
}

// BenchmarkDistinctEver: one add and one as-of query per event, the
// pipeline's pattern, on an entity that already holds n distinct items,
// with events cycling through 4n items (so a quarter of the adds are new
// early on and repeats later). The baseline is the plain library pattern
// the summary avoids: insert, then Estimate, on every event.
//
//	go test -run '^$' -bench DistinctEver -benchtime 20000x ./sketch/
func BenchmarkDistinctEver(b *testing.B) {
	for _, n := range []int{10, 1_000, 100_000} {
		hs := benchHashes(4*n, 3)
		spec := DistinctEverSpec{Horizon: 5 * sec}
		fill := func() *DistinctEver {
			d := mustEver(b, spec)
			for i, h := range hs[:n] {
				d.Add(benchT0+int64(i)*sec/100, h)
			}
			return d
		}
		b.Run(fmt.Sprintf("n=%d/summary", n), func(b *testing.B) {
			d := fill()
			t := benchT0 + int64(n)*sec/100
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				t += sec / 100
				d.Add(t, hs[i%len(hs)])
				_ = d.DistinctAt(t)
			}
			b.ReportMetric(float64(d.SizeBytes()), "bytes")
		})
		b.Run(fmt.Sprintf("n=%d/baseline-estimate-per-event", n), func(b *testing.B) {
			s, _ := hyperloglog.NewSketch(defaultEverPrecision, true)
			for _, h := range hs[:n] {
				s.InsertHash(h)
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				s.InsertHash(hs[i%len(hs)])
				_ = s.Estimate()
			}
		})
	}
}

// BenchmarkDistinctExactAdd: Add in exact mode (ExactLimit 4096) on a
// stream whose window holds n distinct items in random order, each new
// to its pane: the adds that used to shift a sorted slice. Ratios across
// n show the cost per add no longer grows with n.
//
//	go test ./sketch/ -run '^$' -bench DistinctExactAdd
func BenchmarkDistinctExactAdd(b *testing.B) {
	spec := DistinctSpec{Window: 3600 * sec, Resolution: 60 * sec, Horizon: 5 * sec, ExactLimit: 4096}
	for _, n := range []int{64, 512, 4096} {
		b.Run(fmt.Sprintf("n=%d", n), func(b *testing.B) {
			hs := benchHashes(n, 3)
			rand.New(rand.NewPCG(3, 3)).Shuffle(len(hs), func(i, j int) { hs[i], hs[j] = hs[j], hs[i] })
			d := mustDistinct(b, spec)
			t := benchT0
			// Each item once per pane: n adds per pane, so no add is
			// absorbed by an entry of its own pane.
			step := 60 * sec / int64(n)
			b.ReportAllocs()
			for i := 0; b.Loop(); i++ {
				t += step
				d.Add(t, hs[i%n])
			}
			if !d.Exact() {
				b.Fatal("left exact mode")
			}
		})
	}
}

// BenchmarkFrontierView: reading every register of a warm summary's
// sliding registers for a new window start, as a view rebuild does once
// per pane boundary: the four-lane comparison against the entry walk it
// replaced (compare the two in one run).
func BenchmarkFrontierView(b *testing.B) {
	const p = 12
	rng := rand.New(rand.NewPCG(3, 4))
	r := newSlidingRegs(p, 0)
	for range 40 << p {
		r.insert(uint32(rng.IntN(1<<p)), int64(rng.IntN(60)), uint8(1+min(bits.LeadingZeros64(rng.Uint64()), 50)))
	}
	var hist [64]uint32
	for _, v := range []struct {
		name string
		f    func(uint64, int64) uint8
	}{{"lanes", inlineValueFrom}, {"walk", walkValueFrom}} {
		b.Run(v.name, func(b *testing.B) {
			start := int64(0)
			for b.Loop() {
				start = (start + 1) % 60
				for _, w := range r.words {
					if w != spillMark {
						hist[v.f(w, start)]++
					}
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N<<p), "ns/register")
		})
	}
}
