package bench

import (
	"flag"
	"math"
	"os"
	"runtime"
	"runtime/pprof"
	"slices"
	"syscall"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/bench/workload"
	"github.com/tallyward/tallyward/internal/store"
)

// A six-feature workload on two entity kinds, shaped like a payments
// deployment: per account a 10-minute sliding count, a 1-hour sliding sum
// of the amount, 24-hour distinct devices, a decayed mean amount (1-hour
// half-life) and a 5-minute/1-hour velocity; per device 1-hour distinct
// accounts. Keys are Zipf(1.1) draws; an account mostly pays from its own
// device. All data are generated before any timer from fixed seeds.
//
// The full-size run (about 5 minutes per variant on 2 cores):
//
//	go test ./bench/ -run '^$' -bench 'Features' -benchtime 1x -timeout 2h \
//	  -args -features.accounts 1000000 -features.devices 3000000 -features.events 5000000
//
// The defaults are a fifth of that (and a cache scaled by the same factor,
// so the cache holds a similar share of the working set).
var (
	featAccounts    = flag.Int("features.accounts", 200_000, "accounts in the six-feature workload")
	featDevices     = flag.Int("features.devices", 600_000, "devices in the six-feature workload")
	featEvents      = flag.Int("features.events", 1_000_000, "events in the six-feature workload")
	featDays        = flag.Int("features.days", 7, "simulated days the events span")
	featCache       = flag.Int64("features.cache", 0, "record cache bytes (0: 256 MiB scaled by accounts/1M)")
	featNaive       = flag.Int("features.naive-events", 300_000, "events of the naive baseline (a prefix: it runs ~40x slower)")
	featCommitEvery = flag.Int("features.commit-every", 100_000, "automatic commit interval (events) of the latency benchmark")
	featRate        = flag.Int("features.rate", 0, "calls per second the latency benchmark paces its timed calls to, as a service under a steady load would see them (0: as fast as they run)")
	featHeapProfile = flag.String("features.heapprofile", "", "write a heap profile to this file where BenchmarkFeatures measures the heap per entity, the pipeline open (with -test.memprofilerate for detail)")
	benchWorkers    = flag.Int("workers", 0, "Options.Workers of the pipelines of BenchmarkFeatures, BenchmarkFeaturesLatency, BenchmarkLive and BenchmarkProcess (0: the pipeline's default)")
)

// payment is the workload's event (package workload holds the generator,
// the spec and both references, shared with the speed report).
type payment = workload.Payment

type featureData struct {
	accounts, devices, days int
	events                  []payment
}

var featCached *featureData

// featureEvents returns the workload for the flag sizes, built once.
func featureEvents() *featureData {
	na, nd, ne, days := *featAccounts, *featDevices, *featEvents, *featDays
	if d := featCached; d != nil && d.accounts == na && d.devices == nd && len(d.events) == ne && d.days == days {
		return d
	}
	ev := workload.Generate(workload.Params{Accounts: na, Devices: nd, Events: ne, Days: days})
	featCached = &featureData{accounts: na, devices: nd, days: days, events: ev}
	return featCached
}

func featureCacheBytes() int64 {
	if *featCache > 0 {
		return *featCache
	}
	return int64(float64(256<<20) * float64(*featAccounts) / 1e6)
}

func featureSpec(emit func(tallyward.Row[payment])) tallyward.Spec[payment] {
	return workload.Spec(emit)
}

// memDelta measures allocations and process CPU time between two
// points. CPU time (every goroutine, GC included) is reported beside wall
// time because the development machine is shared: under load, CPU per
// event is the steadier figure.
type memDelta struct {
	before runtime.MemStats
	cpu    time.Duration
}

func (m *memDelta) start() {
	runtime.ReadMemStats(&m.before)
	m.cpu = cpuTime()
}

func (m *memDelta) cpuSince() time.Duration { return cpuTime() - m.cpu }

func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

func (m *memDelta) stop() (mallocs, bytes uint64) {
	var after runtime.MemStats
	runtime.ReadMemStats(&after)
	return after.Mallocs - m.before.Mallocs, after.TotalAlloc - m.before.TotalAlloc
}

func heapNow() uint64 {
	runtime.GC()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return ms.HeapAlloc
}

// BenchmarkFeatures runs the six-feature workload through a pipeline on
// disk from a new store, one pass per b.N, with automatic commits every
// 100k events (the default). Reported per pass: events/s, allocs/event,
// B/event, the heap held per cached entity (Go heap measured after a GC,
// over the number of cached records; Pebble's own caches are allocated
// outside the Go heap), the store's size estimate per cached entity, the
// cache hit rate and the caller's mean time per commit.
//
// naive and ceiling are the same-run references: the same aggregates with
// a Pebble Get and Set per entity per event (store settings, no cache),
// and the same aggregates in a Go map with nothing persisted.
func BenchmarkFeatures(b *testing.B) {
	data := featureEvents()
	for _, c := range []struct {
		name string
		mode tallyward.Mode
		dis  time.Duration
	}{
		{"eager", tallyward.Eager, 0},
		{"settled", tallyward.Settled, 30 * time.Second},
	} {
		b.Run(c.name, func(b *testing.B) {
			var rows uint64
			var last tallyward.Stats
			var heapPerEntity float64
			var md memDelta
			var mallocs, allocBytes uint64
			var cpu time.Duration
			for range b.N {
				b.StopTimer()
				opts := tallyward.Options{Dir: b.TempDir(), Mode: c.mode, MaxDisorder: c.dis, CacheBytes: featureCacheBytes(), Workers: *benchWorkers}
				base := heapNow()
				p, err := tallyward.Open(featureSpec(func(tallyward.Row[payment]) { rows++ }), opts)
				if err != nil {
					b.Fatal(err)
				}
				md.start()
				b.StartTimer()
				for _, e := range data.events {
					if err := p.Process(e); err != nil {
						b.Fatal(err)
					}
				}
				if err := p.Flush(); err != nil {
					b.Fatal(err)
				}
				b.StopTimer()
				cpu += md.cpuSince()
				m, by := md.stop()
				mallocs += m
				allocBytes += by
				// Land any commit in flight so the heap holds records only.
				if err := p.Commit(nil); err != nil {
					b.Fatal(err)
				}
				last = p.Stats()
				heapPerEntity = float64(heapNow()-min(base, heapNow())) / float64(max(last.CachedKeys, 1))
				if *featHeapProfile != "" {
					writeHeapProfile(b, *featHeapProfile)
				}
				if err := p.Close(); err != nil {
					b.Fatal(err)
				}
				b.StartTimer()
			}
			n := float64(b.N) * float64(len(data.events))
			b.ReportMetric(n/b.Elapsed().Seconds(), "events/s")
			b.ReportMetric(float64(mallocs)/n, "allocs/event")
			b.ReportMetric(float64(cpu.Nanoseconds())/n, "cpu-ns/event")
			b.ReportMetric(float64(allocBytes)/n, "B/event")
			b.ReportMetric(heapPerEntity, "heapB/entity")
			b.ReportMetric(float64(last.CachedBytes)/float64(max(last.CachedKeys, 1)), "estB/entity")
			b.ReportMetric(float64(last.CachedKeys), "cached")
			b.ReportMetric(float64(last.Commits), "commits")
			b.ReportMetric(float64(last.LiveEntities), "live")
			b.ReportMetric(last.HitRate(), "hit-rate")
			b.ReportMetric(last.TotalCommitDuration.Seconds()/float64(max(last.Commits, 1))*1e3, "caller-ms/commit")
			if rows != uint64(b.N)*uint64(len(data.events)) {
				b.Fatalf("%d rows for %d events", rows, uint64(b.N)*uint64(len(data.events)))
			}
		})
	}
	b.Run("naive", func(b *testing.B) {
		for range b.N {
			b.StopTimer()
			naive := openNaive(b)
			b.StartTimer()
			for _, e := range data.events[:min(*featNaive, len(data.events))] {
				naive.event(b, e)
			}
			b.StopTimer()
			naive.Close()
			b.StartTimer()
		}
		b.ReportMetric(float64(b.N)*float64(min(*featNaive, len(data.events)))/b.Elapsed().Seconds(), "events/s")
	})
	b.Run("ceiling", func(b *testing.B) {
		for range b.N {
			b.StopTimer()
			c := newCeiling()
			b.StartTimer()
			for _, e := range data.events {
				c.Event(e)
			}
		}
		b.ReportMetric(float64(b.N)*float64(len(data.events))/b.Elapsed().Seconds(), "events/s")
	})
}

func newCeiling() *workload.Ceiling { return workload.NewCeiling() }

// naiveStore is the baseline of package workload on Pebble opened with
// exactly the store's settings.
type naiveStore struct{ *workload.Naive }

func openNaive(b *testing.B) naiveStore {
	popts := store.PebbleOptions(store.Options{FS: vfs.Default, Logger: quiet{}})
	n, err := workload.OpenNaive(b.TempDir(), popts)
	popts.Cache.Unref()
	if err != nil {
		b.Fatal(err)
	}
	return naiveStore{n}
}

func (n naiveStore) event(b *testing.B, e payment) {
	if err := n.Event(e); err != nil {
		b.Fatal(err)
	}
}

// BenchmarkFeaturesLatency times every inline Score call of the
// six-feature workload on a warm store with automatic commits every
// -features.commit-every events: the first half of the stream is processed
// untimed, then each call of the second half is timed on its own, so the
// calls that cut a commit, and those made while its records are written
// in the background, are among the timed ones. Reported: p50, p99, p99.9
// and max of all calls; p50 and p99 of calls whose entities were seen
// before (cache hits: the cache holds everything here); the median and
// longest call that cut a commit; p99 and max of the calls that started within 1 s
// after a cut (the pipeline does not say when a background commit lands,
// so the window stands for it); and the worst call: its index in the
// timed half and whether it cut a commit (also logged). With
// -features.rate the timed calls follow a fixed schedule of that many per
// second, as an inline service under a steady load sees them; without it
// they run back to back, so the background commits compete with them.
func BenchmarkFeaturesLatency(b *testing.B) {
	data := featureEvents()
	commitEvery := *featCommitEvery
	half := len(data.events) / 2
	seenA, seenD := map[string]bool{}, map[string]bool{}
	hit := make([]bool, len(data.events))
	for i, e := range data.events {
		hit[i] = seenA[e.Account] && seenD[e.Device]
		seenA[e.Account], seenD[e.Device] = true, true
	}
	clear(seenA)
	clear(seenD)
	var hits, all, afterCut, cuts []time.Duration
	var cutMax, worst time.Duration
	worstAt, worstCut := 0, false
	for range b.N {
		b.StopTimer()
		p, err := tallyward.Open(featureSpec(nil), tallyward.Options{Dir: b.TempDir(), CacheBytes: 4 << 30, CommitEvery: commitEvery, Workers: *benchWorkers})
		if err != nil {
			b.Fatal(err)
		}
		var out []float64
		for _, e := range data.events[:half] {
			if out, err = p.Score(e, out[:0]); err != nil {
				b.Fatal(err)
			}
		}
		hits, all, afterCut, cuts = hits[:0], all[:0], afterCut[:0], cuts[:0]
		var cut time.Time
		b.StartTimer()
		began := time.Now()
		for i := half; i < len(data.events); i++ {
			if *featRate > 0 {
				// A fixed schedule: sleep while ahead of it; calls that
				// fall behind are made at once until it is caught up.
				due := began.Add(time.Duration(i-half) * time.Second / time.Duration(*featRate))
				if d := time.Until(due); d > 0 {
					time.Sleep(d)
				}
			}
			t0 := time.Now()
			out, err = p.Score(data.events[i], out[:0])
			d := time.Since(t0)
			if err != nil {
				b.Fatal(err)
			}
			all = append(all, d)
			if hit[i] {
				hits = append(hits, d)
			}
			isCut := commitEvery > 0 && (i+1)%commitEvery == 0
			switch {
			case isCut:
				cutMax, cut = max(cutMax, d), t0
				cuts = append(cuts, d)
			case !cut.IsZero() && t0.Sub(cut) < time.Second:
				afterCut = append(afterCut, d)
			}
			if d > worst {
				worst, worstAt, worstCut = d, i-half, isCut
			}
		}
		b.StopTimer()
		if err := p.Close(); err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
	}
	slices.Sort(hits)
	slices.Sort(all)
	slices.Sort(afterCut)
	slices.Sort(cuts)
	q := func(s []time.Duration, f float64) float64 {
		if len(s) == 0 {
			return math.NaN()
		}
		return float64(s[min(int(f*float64(len(s))), len(s)-1)].Nanoseconds())
	}
	b.ReportMetric(q(all, 0.5), "p50-ns")
	b.ReportMetric(q(all, 0.99), "p99-ns")
	b.ReportMetric(q(all, 0.999), "p99.9-ns")
	b.ReportMetric(q(all, 1), "max-ns")
	b.ReportMetric(q(hits, 0.5), "p50-hit-ns")
	b.ReportMetric(q(hits, 0.99), "p99-hit-ns")
	slow := 0
	for _, d := range cuts {
		if d > time.Millisecond {
			slow++
		}
	}
	b.ReportMetric(float64(len(cuts)), "cut-calls")
	b.ReportMetric(float64(slow), "cut-calls-over-1ms")
	b.ReportMetric(q(cuts, 0.5), "p50-cut-call-ns")
	b.ReportMetric(float64(cutMax.Nanoseconds()), "max-cut-call-ns")
	b.ReportMetric(q(afterCut, 0.99), "p99-after-cut-ns")
	b.ReportMetric(q(afterCut, 1), "max-after-cut-ns")
	b.ReportMetric(float64(worstAt), "worst-call")
	b.ReportMetric(map[bool]float64{false: 0, true: 1}[worstCut], "worst-cut")
	b.ReportMetric(float64(len(data.events)-half)*float64(b.N)/b.Elapsed().Seconds(), "events/s")
	b.Logf("worst call: %d of the timed half (event %d), %v, cut a commit: %v", worstAt, half+worstAt, worst, worstCut)
}

// writeHeapProfile writes the heap's live objects to path.
func writeHeapProfile(b *testing.B, path string) {
	f, err := os.Create(path)
	if err != nil {
		b.Fatal(err)
	}
	defer f.Close()
	if err := pprof.Lookup("heap").WriteTo(f, 0); err != nil {
		b.Fatal(err)
	}
}
