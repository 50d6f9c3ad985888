package bench

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/window"
)

// event is a payment attempt against a card.
type event struct {
	T    int64
	Card string
}

const (
	numEntities = 1_000_000
	numDraws    = 1 << 22 // pre-generated key draws, cycled
	step        = int64(time.Millisecond)
	start       = int64(1_700_000_000) * int64(time.Second)
)

var (
	cardNames []string
	draws     []int32
)

// inputs builds 1M entity keys and 4M Zipf(1.1) draws once, before any
// timer starts.
func inputs() ([]string, []int32) {
	if cardNames == nil {
		cardNames = make([]string, numEntities)
		for i := range cardNames {
			cardNames[i] = fmt.Sprintf("card-%07d", i)
		}
		r := rand.New(rand.NewPCG(1, 2))
		z := rand.NewZipf(r, 1.1, 1, numEntities-1)
		draws = make([]int32, numDraws)
		for i := range draws {
			draws[i] = int32(z.Uint64())
		}
	}
	return cardNames, draws
}

// processWarmup is the number of events the warm cases process untimed.
const processWarmup = 2_000_000

var countKind = tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}

func spec() tallyward.Spec[event] {
	return tallyward.Spec[event]{
		Time: func(e event) int64 { return e.T },
		Entities: []tallyward.Entity[event]{{
			Name: "card", Key: func(e event) string { return e.Card },
			Features: []tallyward.Feature[event]{{Name: "payments_10m", Kind: countKind}},
		}},
	}
}

// BenchmarkProcess measures Score (process + features returned) with one
// sliding-count feature over 1M entities with Zipf(1.1) keys.
//
//   - cold: a new store; every first sight of an entity is a Pebble miss.
//   - warm: the same stream continued after one untimed pass over 2M
//     events, so the cache holds the working set (when it fits).
//
// on mem (in-memory Pebble) and disk, with a cache that holds every entity
// (2 GiB) or far less than the working set (16 MiB). Automatic synced
// commits every 100k events stay on, so commit cost is included.
func BenchmarkProcess(b *testing.B) {
	keys, draws := inputs()
	for _, c := range []struct {
		name  string
		disk  bool
		cache int64
		warm  bool
	}{
		{"mem/cache-fits/cold", false, 2 << 30, false},
		{"mem/cache-fits/warm", false, 2 << 30, true},
		{"disk/cache-fits/cold", true, 2 << 30, false},
		{"disk/cache-fits/warm", true, 2 << 30, true},
		{"disk/cache-16MiB/warm", true, 16 << 20, true},
	} {
		b.Run(c.name, func(b *testing.B) {
			opts := tallyward.Options{CacheBytes: c.cache, Workers: *benchWorkers}
			if c.disk {
				opts.Dir = b.TempDir()
			}
			p, err := tallyward.Open(spec(), opts)
			if err != nil {
				b.Fatal(err)
			}
			defer p.Close()
			var out []float64
			first := 0
			if c.warm {
				first = processWarmup
			}
			score := func(i int) {
				e := event{T: start + int64(i)*step, Card: keys[draws[i%numDraws]]}
				if out, err = p.Score(e, out[:0]); err != nil {
					b.Fatal(err)
				}
			}
			for i := range first {
				score(i)
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				score(first + i)
			}
			b.StopTimer()
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "events/s")
		})
	}
}

// BenchmarkProcessHot is the cache-hit path alone: 1000 hot entities,
// warmed before the timer, no automatic commits. Target: 0 allocs/op.
func BenchmarkProcessHot(b *testing.B) {
	keys, _ := inputs()
	p, err := tallyward.Open(spec(), tallyward.Options{CommitEvery: -1})
	if err != nil {
		b.Fatal(err)
	}
	defer p.Close()
	var out []float64
	for i := range 100_000 {
		if out, err = p.Score(event{T: start + int64(i)*step, Card: keys[i%1000]}, out[:0]); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		e := event{T: start + int64(100_000+i)*step, Card: keys[i%1000]}
		if out, err = p.Score(e, out[:0]); err != nil {
			b.Fatal(err)
		}
	}
	b.StopTimer()
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "events/s")
}

// BenchmarkNaiveGetSet is the baseline: per event, a Pebble Get of the
// entity's encoded count, decode, add, encode and a Pebble Set, with no
// cache. Same keys, same aggregate, same store settings. disk/warm first
// runs the 2M events BenchmarkProcess's warm cases warm up with (untimed),
// so the two are compared on stores that hold the same entities.
func BenchmarkNaiveGetSet(b *testing.B) {
	keys, draws := inputs()
	for _, c := range []struct {
		name string
		disk bool
		warm bool
	}{{"mem", false, false}, {"disk", true, false}, {"disk/warm", true, true}} {
		b.Run(c.name, func(b *testing.B) {
			// Exactly the store's Pebble settings, so the ratio measures
			// what the store does rather than how Pebble is tuned.
			sopts := store.Options{FS: vfs.NewMem(), Logger: quiet{}}
			dir := "naive"
			if c.disk {
				sopts.FS, dir = vfs.Default, b.TempDir()
			}
			popts := store.PebbleOptions(sopts)
			defer popts.Cache.Unref()
			db, err := pebble.Open(dir, popts)
			if err != nil {
				b.Fatal(err)
			}
			defer db.Close()
			spec := window.SlidingSpec{Window: countKind.Window, Resolution: countKind.Resolution, Horizon: 1}
			var buf []byte
			event := func(i int) {
				key := []byte(keys[draws[i%numDraws]])
				t := start + int64(i)*step
				c, _ := window.NewSlidingCount(spec)
				v, closer, err := db.Get(key)
				if err == nil {
					err = c.UnmarshalBinary(v)
					closer.Close()
					if err != nil {
						b.Fatal(err)
					}
				} else if err != pebble.ErrNotFound {
					b.Fatal(err)
				}
				c.Add(t)
				_ = c.CountAt(t)
				if buf, err = c.AppendBinary(buf[:0]); err != nil {
					b.Fatal(err)
				}
				if err := db.Set(key, buf, pebble.NoSync); err != nil {
					b.Fatal(err)
				}
			}
			first := 0
			if c.warm {
				first = processWarmup
				for i := range first {
					event(i)
				}
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				event(first + i)
			}
			b.StopTimer()
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "events/s")
		})
	}
}

type quiet struct{}

func (quiet) Infof(string, ...any)  {}
func (quiet) Errorf(string, ...any) {}
func (quiet) Fatalf(f string, a ...any) {
	panic(fmt.Sprintf(f, a...))
}

// BenchmarkCeilingRings is the exact in-memory ceiling of BenchmarkProcess:
// per key a ring of event times in a Go map, the count of the last 10
// minutes read after each event, nothing persisted. Like the warm cases
// it first runs processWarmup events untimed, so the map holds the same
// entities.
func BenchmarkCeilingRings(b *testing.B) {
	keys, draws := inputs()
	type ring struct {
		ts         []int64
		head, size int
	}
	m := map[string]*ring{}
	window := int64(countKind.Window)
	var sink int
	event := func(i int) {
		t := start + int64(i)*step
		k := keys[draws[i%numDraws]]
		r := m[k]
		if r == nil {
			r = &ring{ts: make([]int64, 4)}
			m[k] = r
		}
		for r.size > 0 && r.ts[r.head] <= t-window {
			r.head = (r.head + 1) % len(r.ts)
			r.size--
		}
		if r.size == len(r.ts) {
			grown := make([]int64, 2*len(r.ts))
			for j := range r.size {
				grown[j] = r.ts[(r.head+j)%len(r.ts)]
			}
			r.ts, r.head = grown, 0
		}
		r.ts[(r.head+r.size)%len(r.ts)] = t
		r.size++
		sink += r.size
	}
	for i := range processWarmup {
		event(i)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		event(processWarmup + i)
	}
	b.StopTimer()
	_ = sink
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "events/s")
}
