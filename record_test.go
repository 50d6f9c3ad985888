package tallyward

import (
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// sixKinds are the kinds of the six-feature workload's account entity
// (bench/workload), the spec the memory targets are set for.
func sixKinds() []Kind {
	return []Kind{
		SlidingCount{Window: 10 * time.Minute},
		SlidingSum{Window: time.Hour},
		Distinct{Window: 24 * time.Hour},
		Decayed{HalfLife: time.Hour, Stat: DecayedMean},
		Velocity{Short: 5 * time.Minute, Long: time.Hour},
	}
}

// sixSpec is the six-feature workload on the test's event: per account a
// 10 min count, a 1 h sum of amounts, 24 h distinct addresses, a decayed
// mean amount and a 5 min / 1 h velocity; per address, 1 h distinct
// accounts.
func sixSpec(emit func(Row[login])) Spec[login] {
	amount := func(e login) float64 { return e.Amount }
	k := sixKinds()
	return Spec[login]{
		Time: func(e login) int64 { return e.T },
		Emit: emit,
		Entities: []Entity[login]{
			{Name: "account", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
				{Name: "payments_10m", Kind: k[0]},
				{Name: "amount_1h", Kind: k[1], Value: amount},
				{Name: "addrs_24h", Kind: k[2], Item: func(e login) string { return e.Addr }},
				{Name: "mean_amount", Kind: k[3], Value: amount},
				{Name: "velocity", Kind: k[4]},
			}},
			{Name: "addr", Key: func(e login) string { return e.Addr }, Features: []Feature[login]{
				{Name: "accounts_1h", Kind: Distinct{Window: time.Hour}, Item: func(e login) string { return e.Account }},
			}},
		},
	}
}

// A record of built-in kinds is one heap object, new or decoded, and an
// expired record is emptied in place without any (a count, not a timing).
func TestRecordIsOneObject(t *testing.T) {
	lay := newRecordLayout(sixKinds(), time.Nanosecond)
	var r *record
	require.Equal(t, 1.0, testing.AllocsPerRun(100, func() { r = lay.newRecord(t0) }))
	for i, a := range r.aggs(nil) {
		require.True(t, a.Add(t0+int64(i), 2, 7), "feature %d", i)
	}
	// A sparse entity's record read back from the store is one object too.
	b, err := r.AppendBinary(nil)
	require.NoError(t, err)
	require.Equal(t, 1.0, testing.AllocsPerRun(100, func() {
		if _, err := lay.decode(b); err != nil {
			t.Fatal(err)
		}
	}))
	require.Zero(t, testing.AllocsPerRun(100, func() { r.reset() }))
	t.Logf("record object: %d bytes (type %d), SizeBytes %d", lay.size, lay.typ.Size(), r.SizeBytes())
	require.LessOrEqual(t, lay.size, 1024, "one record object of the six-feature account entity")
}

// A record emptied in place is a new record: over seeded streams, one
// reset after use and one made new give the same answers and bytes. A
// user kind (not placed) in the middle is remade by its NewAggregate.
func TestRecordResetEqualsNew(t *testing.T) {
	kinds := append(sixKinds(), Recency{Stat: SessionEvents}, DistinctEver{}, SlidingMin{Window: time.Hour}, SlidingMax{Window: time.Hour}, SlidingMean{Window: time.Hour}, Recency{Stat: SinceLast}, Recency{Stat: Age})
	for _, horizon := range []time.Duration{time.Nanosecond, 30 * time.Second} {
		lay := newRecordLayout(kinds, horizon)
		r := rand.New(rand.NewPCG(uint64(horizon), 3))
		used := lay.newRecord(0)
		feed := func(rec *record, seed uint64, n int) {
			rr := rand.New(rand.NewPCG(seed, 1))
			tt := t0
			for range n {
				tt += rr.Int64N(int64(2 * time.Minute))
				for _, a := range rec.aggs(nil) {
					a.Add(tt-rr.Int64N(int64(horizon)), float64(rr.IntN(100)), rr.Uint64N(50))
				}
			}
		}
		for round := range 20 {
			feed(used, r.Uint64(), 1+r.IntN(300))
			used.reset()
			fresh := lay.newRecord(0)
			seed, n := r.Uint64(), 1+r.IntN(300)
			feed(used, seed, n)
			feed(fresh, seed, n)
			used.last, fresh.last = 1, 1
			b1, err := used.AppendBinary(nil)
			require.NoError(t, err)
			b2, err := fresh.AppendBinary(nil)
			require.NoError(t, err)
			require.Equal(t, b2, b1, "round %d", round)
			for i := range used.features() {
				at := t0 + int64(n)*int64(time.Minute)
				require.Equal(t, math.Float64bits(fresh.agg(i).At(at, 3)), math.Float64bits(used.agg(i).At(at, 3)), "round %d feature %d", round, i)
			}
		}
	}
}

// SizeBytes of a placed record is close to what it holds on the heap:
// records built and fed in bulk, measured by the runtime after a GC.
func TestRecordSizeBytesIsHonest(t *testing.T) {
	if !InFreshProcess(t) {
		return
	}
	lay := newRecordLayout(sixKinds(), time.Nanosecond)
	const n = 20000
	recs := make([]*record, n)
	r := rand.New(rand.NewPCG(5, 5))
	var ms runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms)
	before := ms.HeapAlloc
	est := 0
	for i := range recs {
		rec := lay.newRecord(0)
		tt := t0
		for range 1 + r.IntN(12) { // Zipf-like: most entities see few events
			tt += r.Int64N(int64(10 * time.Minute))
			for _, a := range rec.aggs(nil) {
				a.Add(tt, 5, r.Uint64N(4))
			}
		}
		recs[i] = rec
		est += rec.SizeBytes()
	}
	runtime.GC()
	runtime.ReadMemStats(&ms)
	heap := int(ms.HeapAlloc - before)
	runtime.KeepAlive(recs)
	t.Logf("heap %d B/record, SizeBytes %d B/record", heap/n, est/n)
	require.InDelta(t, 1, float64(est)/float64(heap), 0.15, "SizeBytes %d vs heap %d per record", est/n, heap/n)
}

// The pipeline's own work per event allocates nothing once an entity's
// record is cached (extraction, validation, apply, the row), and a new or
// expired record costs one object (plus the cache's slot for a new key):
// allocations per event on the six-feature spec in Eager and Settled
// modes, counted, never timed. Commits are kept out (they belong to the
// store); TestSixFeatureMemory counts everything.
func TestAllocationsPerEvent(t *testing.T) {
	if raceEnabled {
		t.Skip("the race detector's instrumentation allocates")
	}
	for _, c := range []struct {
		mode Mode
		dis  time.Duration
		warm float64 // max allocations per event, every record cached
		all  float64 // max allocations per event, with new and expired entities
	}{
		{Eager, 0, 0.01, 0.5},
		{Settled, 30 * time.Second, 0.01, 0.5},
	} {
		t.Run(c.mode.String(), func(t *testing.T) {
			perEvent := func(p *Pipeline[login], evs []login) float64 {
				var a, b runtime.MemStats
				runtime.ReadMemStats(&a)
				for _, e := range evs {
					if err := p.Process(e); err != nil {
						t.Fatal(err)
					}
				}
				runtime.ReadMemStats(&b)
				return float64(b.Mallocs-a.Mallocs) / float64(len(evs))
			}
			opts := Options{Mode: c.mode, MaxDisorder: c.dis, CommitEvery: 1 << 30, CacheBytes: 1 << 30}
			// Warm: 30 accounts and 30 addresses, all seen in the first
			// half, none idle long enough to expire.
			evs := genLogins(11, 40000, 30, 30, c.dis/2)
			p := openTest(t, sixSpec(func(Row[login]) {}), opts)
			half := len(evs) / 2
			perEvent(p, evs[:half])
			next := half
			warm := testing.AllocsPerRun(len(evs)-half-1, func() {
				if err := p.Process(evs[next]); err != nil {
					t.Fatal(err)
				}
				next++
			})
			// All: 2000 accounts and 3000 addresses, new keys and expired
			// entities throughout.
			evs = genLogins(12, 60000, 2000, 3000, c.dis/2)
			p = openTest(t, sixSpec(func(Row[login]) {}), opts)
			perEvent(p, evs[:half])
			all := perEvent(p, evs[half:])
			t.Logf("%v: %.4f allocations per event warm, %.3f with new and expired entities", c.mode, warm, all)
			require.LessOrEqual(t, warm, c.warm, "warm")
			require.LessOrEqual(t, all, c.all, "with new and expired entities")
		})
	}
}

// RaceDetector tells the external tests (package tallyward_test) that
// allocations cannot be counted.
const RaceDetector = raceEnabled

// InFreshProcess runs the calling test again in a child process and
// reports its outcome, unless this is that child (it then returns true
// and the test measures). Heap figures are only honest in a process of
// their own: earlier tests' stores and goroutines free and allocate
// while a measurement runs.
func InFreshProcess(t *testing.T) bool {
	const env = "TALLYWARD_MEASURE_CHILD"
	if os.Getenv(env) == t.Name() {
		return true
	}
	args := []string{"-test.run=^" + t.Name() + "$", "-test.count=1", "-test.v"}
	if testing.Short() {
		args = append(args, "-test.short")
	}
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = append(os.Environ(), env+"="+t.Name())
	out, err := cmd.CombinedOutput()
	for _, line := range strings.Split(string(out), "\n") {
		if strings.Contains(line, "_test.go:") {
			t.Log(strings.TrimSpace(line))
		}
	}
	if err != nil {
		t.Fatalf("measuring child: %v\n%s", err, out)
	}
	return false
}
