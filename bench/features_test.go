package bench

import (
	"encoding/binary"
	"errors"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"syscall"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward"
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
	featAccounts = flag.Int("features.accounts", 200_000, "accounts in the six-feature workload")
	featDevices  = flag.Int("features.devices", 600_000, "devices in the six-feature workload")
	featEvents   = flag.Int("features.events", 1_000_000, "events in the six-feature workload")
	featDays     = flag.Int("features.days", 7, "simulated days the events span")
	featCache    = flag.Int64("features.cache", 0, "record cache bytes (0: 256 MiB scaled by accounts/1M)")
	featNaive    = flag.Int("features.naive-events", 300_000, "events of the naive baseline (a prefix: it runs ~40x slower)")
)

// payment is one card payment: who paid, from which device, how much.
type payment struct {
	T       int64
	Account string
	Device  string
	Amount  float64
}

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
	r := rand.New(rand.NewPCG(9, 9))
	za := rand.NewZipf(r, 1.1, 1, uint64(na-1))
	zd := rand.NewZipf(r, 1.1, 1, uint64(nd-1))
	acct := make([]string, na)
	for i := range acct {
		acct[i] = fmt.Sprintf("acct-%07d", i)
	}
	dev := make([]string, nd)
	for i := range dev {
		dev[i] = fmt.Sprintf("dev-%08d", i)
	}
	span := int64(days) * int64(24*time.Hour)
	ev := make([]payment, ne)
	for i := range ev {
		a := int(za.Uint64())
		d := int((uint64(a) * 2654435761) % uint64(nd)) // the account's own device
		if r.IntN(10) == 0 {
			d = int(zd.Uint64())
		}
		ev[i] = payment{
			T:       start + int64(i)*(span/int64(ne)),
			Account: acct[a],
			Device:  dev[d],
			Amount:  math.Round(r.ExpFloat64()*5000) / 100,
		}
	}
	featCached = &featureData{accounts: na, devices: nd, days: days, events: ev}
	return featCached
}

func featureCacheBytes() int64 {
	if *featCache > 0 {
		return *featCache
	}
	return int64(float64(256<<20) * float64(*featAccounts) / 1e6)
}

var (
	payCount    = tallyward.SlidingCount{Window: 10 * time.Minute}
	paySum      = tallyward.SlidingSum{Window: time.Hour}
	payDevices  = tallyward.Distinct{Window: 24 * time.Hour}
	payMean     = tallyward.Decayed{HalfLife: time.Hour, Stat: tallyward.DecayedMean}
	payVelocity = tallyward.Velocity{Short: 5 * time.Minute, Long: time.Hour}
	devAccounts = tallyward.Distinct{Window: time.Hour}
)

func featureSpec(emit func(tallyward.Row[payment])) tallyward.Spec[payment] {
	amount := func(p payment) float64 { return p.Amount }
	return tallyward.Spec[payment]{
		Time: func(p payment) int64 { return p.T },
		Emit: emit,
		Entities: []tallyward.Entity[payment]{
			{Name: "account", Key: func(p payment) string { return p.Account }, Features: []tallyward.Feature[payment]{
				{Name: "payments_10m", Kind: payCount},
				{Name: "amount_1h", Kind: paySum, Value: amount},
				{Name: "devices_24h", Kind: payDevices, Item: func(p payment) string { return p.Device }},
				{Name: "mean_amount", Kind: payMean, Value: amount},
				{Name: "velocity", Kind: payVelocity},
			}},
			{Name: "device", Key: func(p payment) string { return p.Device }, Features: []tallyward.Feature[payment]{
				{Name: "accounts_1h", Kind: devAccounts, Item: func(p payment) string { return p.Account }},
			}},
		},
	}
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
				opts := tallyward.Options{Dir: b.TempDir(), Mode: c.mode, MaxDisorder: c.dis, CacheBytes: featureCacheBytes()}
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
			naive.db.Close()
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
				c.event(e)
			}
		}
		b.ReportMetric(float64(b.N)*float64(len(data.events))/b.Elapsed().Seconds(), "events/s")
	})
}

// ceiling keeps the same aggregates per key in Go maps and persists
// nothing: what the workload costs with no store at all.
type ceiling struct {
	acct, dev map[string][]tallyward.Aggregate
	out       [6]float64
}

func newCeiling() *ceiling {
	return &ceiling{acct: map[string][]tallyward.Aggregate{}, dev: map[string][]tallyward.Aggregate{}}
}

const horizon = time.Nanosecond

func acctAggs() []tallyward.Aggregate {
	return []tallyward.Aggregate{payCount.NewAggregate(horizon), paySum.NewAggregate(horizon),
		payDevices.NewAggregate(horizon), payMean.NewAggregate(horizon), payVelocity.NewAggregate(horizon)}
}

func devAggs() []tallyward.Aggregate {
	return []tallyward.Aggregate{devAccounts.NewAggregate(horizon)}
}

func (c *ceiling) event(e payment) {
	a := c.acct[e.Account]
	if a == nil {
		a = acctAggs()
		c.acct[e.Account] = a
	}
	d := c.dev[e.Device]
	if d == nil {
		d = devAggs()
		c.dev[e.Device] = d
	}
	applyPayment(a, d, e, &c.out)
}

// itemHash stands in for the pipeline's item hash (any good 64-bit hash
// costs the same here).
func itemHash(s string) uint64 {
	h := uint64(14695981039346656037)
	for i := 0; i < len(s); i++ {
		h ^= uint64(s[i])
		h *= 1099511628211
	}
	return h
}

func applyPayment(a, d []tallyward.Aggregate, e payment, out *[6]float64) {
	dh, ah := itemHash(e.Device), itemHash(e.Account)
	a[0].Add(e.T, 1, 0)
	a[1].Add(e.T, e.Amount, 0)
	a[2].Add(e.T, 0, dh)
	a[3].Add(e.T, e.Amount, 0)
	a[4].Add(e.T, 1, 0)
	d[0].Add(e.T, 0, ah)
	for i, g := range a {
		out[i] = g.At(e.T, dh)
	}
	out[5] = d[0].At(e.T, ah)
}

// naiveStore is the baseline: per event and entity a Pebble Get, a decode
// of every aggregate, the update, an encode and a Set; Pebble opened with
// exactly the store's settings.
type naiveStore struct {
	db   *pebble.DB
	key  []byte
	buf  []byte
	aggA []tallyward.Aggregate
	aggD []tallyward.Aggregate
	out  [6]float64
}

func openNaive(b *testing.B) *naiveStore {
	popts := store.PebbleOptions(store.Options{FS: vfs.Default, Logger: quiet{}})
	db, err := pebble.Open(b.TempDir(), popts)
	popts.Cache.Unref()
	if err != nil {
		b.Fatal(err)
	}
	return &naiveStore{db: db}
}

func (n *naiveStore) load(b *testing.B, key string, fresh func() []tallyward.Aggregate) []tallyward.Aggregate {
	aggs := fresh()
	n.key = append(n.key[:0], key...)
	v, closer, err := n.db.Get(n.key)
	if errors.Is(err, pebble.ErrNotFound) {
		return aggs
	}
	if err != nil {
		b.Fatal(err)
	}
	defer closer.Close()
	for _, a := range aggs {
		l, k := binary.Uvarint(v)
		if k <= 0 || uint64(len(v)-k) < l {
			b.Fatal("naive: short value")
		}
		if err := a.UnmarshalBinary(v[k : k+int(l)]); err != nil {
			b.Fatal(err)
		}
		v = v[k+int(l):]
	}
	return aggs
}

func (n *naiveStore) save(b *testing.B, key string, aggs []tallyward.Aggregate) {
	n.buf = n.buf[:0]
	var one []byte
	var err error
	for _, a := range aggs {
		if one, err = a.AppendBinary(one[:0]); err != nil {
			b.Fatal(err)
		}
		n.buf = binary.AppendUvarint(n.buf, uint64(len(one)))
		n.buf = append(n.buf, one...)
	}
	n.key = append(n.key[:0], key...)
	if err := n.db.Set(n.key, n.buf, pebble.NoSync); err != nil {
		b.Fatal(err)
	}
}

func (n *naiveStore) event(b *testing.B, e payment) {
	a := n.load(b, "a"+e.Account, acctAggs)
	d := n.load(b, "d"+e.Device, devAggs)
	applyPayment(a, d, e, &n.out)
	n.save(b, "a"+e.Account, a)
	n.save(b, "d"+e.Device, d)
}

// BenchmarkFeaturesLatency times every inline Score call of the
// six-feature workload on a warm store: the first half of the stream is
// processed untimed, then each call of the second half is timed on its
// own. Reported: p50 and p99 of calls whose entities were seen before
// (cache hits: the cache holds everything here), the p99 and the longest
// of all calls, and the longest call that ran an automatic commit.
func BenchmarkFeaturesLatency(b *testing.B) {
	data := featureEvents()
	const commitEvery = 100_000
	half := len(data.events) / 2
	seenA, seenD := map[string]bool{}, map[string]bool{}
	hit := make([]bool, len(data.events))
	for i, e := range data.events {
		hit[i] = seenA[e.Account] && seenD[e.Device]
		seenA[e.Account], seenD[e.Device] = true, true
	}
	clear(seenA)
	clear(seenD)
	var hits, all []time.Duration
	var commitMax time.Duration
	for range b.N {
		b.StopTimer()
		p, err := tallyward.Open(featureSpec(nil), tallyward.Options{Dir: b.TempDir(), CacheBytes: 4 << 30, CommitEvery: commitEvery})
		if err != nil {
			b.Fatal(err)
		}
		var out []float64
		for _, e := range data.events[:half] {
			if out, err = p.Score(e, out[:0]); err != nil {
				b.Fatal(err)
			}
		}
		hits, all = hits[:0], all[:0]
		b.StartTimer()
		for i := half; i < len(data.events); i++ {
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
			if (i+1)%commitEvery == 0 {
				commitMax = max(commitMax, d)
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
	q := func(s []time.Duration, f float64) float64 {
		if len(s) == 0 {
			return math.NaN()
		}
		return float64(s[min(int(f*float64(len(s))), len(s)-1)].Nanoseconds())
	}
	b.ReportMetric(q(hits, 0.5), "p50-hit-ns")
	b.ReportMetric(q(hits, 0.99), "p99-hit-ns")
	b.ReportMetric(q(all, 0.99), "p99-ns")
	b.ReportMetric(q(all, 1), "max-ns")
	b.ReportMetric(float64(commitMax.Nanoseconds()), "max-commit-call-ns")
	b.ReportMetric(float64(len(data.events)-half)*float64(b.N)/b.Elapsed().Seconds(), "events/s")
}
