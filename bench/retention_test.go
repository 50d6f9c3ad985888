package bench

import (
	"encoding/binary"
	"errors"
	"flag"
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/store"
)

// Benchmarks of the retention of state: what a commit costs per dirty
// entity, how long a large store takes to reopen and serve its first
// event, and what an expiry sweep costs per expired entity. All on disk
// (b.TempDir), inputs built before the timer with fixed seeds.
//
// Compare runs with benchstat:
//
//	go test ./bench/ -run '^$' -bench 'Commit|Recovery|Sweep' -benchtime 5x -count 6 > new.txt
//	benchstat old.txt new.txt

// lrec is a stored record of fixed size: the newest event time and a
// small payload, about the size of one entity's sliding count.
type lrec struct {
	last    int64
	payload [48]byte
}

func (r *lrec) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, 1)
	dst = binary.AppendVarint(dst, r.last)
	return append(dst, r.payload[:]...), nil
}

func (r *lrec) SizeBytes() int  { return 64 }
func (r *lrec) LastTime() int64 { return r.last }

func decodeLrec(b []byte) (*lrec, error) {
	if len(b) < 2 || b[0] != 1 {
		return nil, errors.New("lrec header")
	}
	last, n := binary.Varint(b[1:])
	if n <= 0 || len(b[1+n:]) != 48 {
		return nil, errors.New("lrec body")
	}
	r := &lrec{last: last}
	copy(r.payload[:], b[1+n:])
	return r, nil
}

func peekLrec(b []byte) (int64, error) {
	if len(b) < 2 || b[0] != 1 {
		return 0, errors.New("lrec header")
	}
	last, n := binary.Varint(b[1:])
	if n <= 0 {
		return 0, errors.New("lrec last")
	}
	return last, nil
}

func entityKeys(n int, seed uint64) []string {
	r := rand.New(rand.NewPCG(seed, 99))
	keys := make([]string, n)
	for i, p := range r.Perm(n) {
		keys[i] = fmt.Sprintf("ent-%08d", p)
	}
	return keys
}

// BenchmarkCommitPerDirty times Store.Commit with n dirty cached entities
// (each an update of a committed record), against a baseline that writes
// the same pre-encoded records in one synced Pebble batch with no cache.
func BenchmarkCommitPerDirty(b *testing.B) {
	for _, n := range []int{1_000, 10_000, 100_000} {
		keys := entityKeys(n, 1)
		b.Run(fmt.Sprintf("store/dirty=%d", n), func(b *testing.B) {
			s, err := store.Open(store.Options{Dir: b.TempDir(), CacheBytes: 1 << 30})
			if err != nil {
				b.Fatal(err)
			}
			defer s.Close()
			tb := store.NewTable(s, "e", 0, decodeLrec)
			slots := make([]*store.Slot[*lrec], n)
			for i, k := range keys {
				slots[i] = tb.Insert(k, &lrec{last: 1})
			}
			if err := s.Commit(store.Mark{}); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				b.StopTimer()
				for _, sl := range slots {
					sl.Value.last++
					sl.Value.payload[0]++
					tb.Touch(sl)
				}
				b.StartTimer()
				if err := s.Commit(store.Mark{Seen: uint64(i)}); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/dirty-entity")
		})
		b.Run(fmt.Sprintf("pebble-batch/dirty=%d", n), func(b *testing.B) {
			s, err := store.Open(store.Options{Dir: b.TempDir()})
			if err != nil {
				b.Fatal(err)
			}
			defer s.Close()
			db := s.DB()
			rkeys := make([][]byte, n)
			for i, k := range keys {
				rkeys[i] = store.RecordKey(nil, "e", k)
			}
			val, _ := (&lrec{last: 1}).AppendBinary(nil)
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				batch := db.NewBatch()
				for _, k := range rkeys {
					val[len(val)-1]++
					if err := batch.Set(k, val, nil); err != nil {
						b.Fatal(err)
					}
				}
				if err := batch.Commit(pebble.Sync); err != nil {
					b.Fatal(err)
				}
				batch.Close()
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/dirty-entity")
		})
	}
}

// levent is one event of the recovery benchmark.
type levent struct {
	T   int64
	Key string
}

func retentionSpec() tallyward.Spec[levent] {
	return tallyward.Spec[levent]{
		Time: func(e levent) int64 { return e.T },
		Entities: []tallyward.Entity[levent]{{
			Name: "acct", Key: func(e levent) string { return e.Key },
			Features: []tallyward.Feature[levent]{{Name: "n_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}}},
		}},
	}
}

// recoveryLarge is the larger store size of BenchmarkRecovery (the
// smaller is 1M). Building 10M entities took 9m17s on a loaded 2-core
// machine, so the default is smaller; ask for more with
//
//	go test ./bench/ -run '^$' -bench Recovery -benchtime 5x -timeout 30m -args -recovery.entities=10000000
var recoveryLarge = flag.Int("recovery.entities", 3_000_000, "entities in the larger store of BenchmarkRecovery")

// BenchmarkRecovery builds, through the pipeline, a store holding n
// entities (one event each, a small cache, one commit per million
// events), closes it, and then times, per iteration, Open of the pipeline
// and its first event: the event of an entity not cached, so a Pebble
// read. Each iteration scores a different stored entity; the commit that
// Close makes is outside the timer.
func BenchmarkRecovery(b *testing.B) {
	const t0 = int64(1_700_000_000) * int64(time.Second)
	for _, n := range []int{1_000_000, *recoveryLarge} {
		dir := b.TempDir()
		keys := entityKeys(n, 2)
		opts := tallyward.Options{Dir: dir, CacheBytes: 16 << 20, CommitEvery: 1_000_000, TTL: -1}
		buildStart := time.Now()
		p, err := tallyward.Open(retentionSpec(), opts)
		if err != nil {
			b.Fatal(err)
		}
		for i, k := range keys {
			if err := p.Process(levent{T: t0 + int64(i)*int64(time.Microsecond), Key: k}); err != nil {
				b.Fatal(err)
			}
		}
		if err := p.Close(); err != nil {
			b.Fatal(err)
		}
		b.Logf("built %d entities in %v", n, time.Since(buildStart).Round(time.Second))
		probe := entityKeys(n, 3) // another order: probes hit cold keys
		tEvent := t0 + int64(n)*int64(time.Microsecond)
		next := 0 // probes never repeat across the runs b.Run makes
		b.Run(fmt.Sprintf("entities=%d", n), func(b *testing.B) {
			var openNs, firstNs int64
			var out []float64
			for i := 0; i < b.N; i++ {
				startOpen := time.Now()
				p, err := tallyward.Open(retentionSpec(), opts)
				if err != nil {
					b.Fatal(err)
				}
				opened := time.Now()
				out, err = p.Score(levent{T: tEvent, Key: probe[next%n]}, out[:0])
				next++
				if err != nil {
					b.Fatal(err)
				}
				first := time.Now()
				openNs += opened.Sub(startOpen).Nanoseconds()
				firstNs += first.Sub(opened).Nanoseconds()
				if out[0] != 2 {
					b.Fatalf("first event of a stored entity counts %v, want 2", out[0])
				}
				b.StopTimer()
				if err := p.Close(); err != nil {
					b.Fatal(err)
				}
				b.StartTimer()
			}
			b.ReportMetric(float64(openNs)/float64(b.N), "open-ns")
			b.ReportMetric(float64(firstNs)/float64(b.N), "first-event-ns")
		})
	}
}

// BenchmarkSweep times Sweep+Commit removing n expired entities from an
// on-disk store that also holds n live ones, reopened so that nothing is
// cached (idle entities are long evicted), against a naive baseline that
// scans every record, decodes it and deletes the expired ones in one
// synced batch.
func BenchmarkSweep(b *testing.B) {
	const ttl = int64(time.Hour)
	const tOld, tNew = int64(1_000) * ttl, int64(1_010) * ttl
	w := tOld + 2*ttl
	for _, n := range []int{10_000, 100_000} {
		expired := entityKeys(n, 4)
		live := entityKeys(n, 5)
		for i := range live {
			live[i] = "live-" + live[i]
		}
		build := func(b *testing.B) string {
			dir := b.TempDir()
			s, err := store.Open(store.Options{Dir: dir, CacheBytes: 1 << 30})
			if err != nil {
				b.Fatal(err)
			}
			tb := store.NewTable(s, "e", ttl, decodeLrec)
			for _, k := range expired {
				tb.Insert(k, &lrec{last: tOld})
			}
			for _, k := range live {
				tb.Insert(k, &lrec{last: tNew})
			}
			if err := s.Commit(store.Mark{}); err != nil {
				b.Fatal(err)
			}
			if err := s.Close(); err != nil {
				b.Fatal(err)
			}
			return dir
		}
		// timed builds a fresh store per iteration, prepares it untimed,
		// and times sweep alone.
		timed := func(b *testing.B, prepare func(*store.Store), sweep func(*store.Store) (int, error)) {
			var elapsed time.Duration
			for i := 0; i < b.N; i++ {
				b.StopTimer()
				s, err := store.Open(store.Options{Dir: build(b)})
				if err != nil {
					b.Fatal(err)
				}
				prepare(s)
				settle(b, s)
				b.StartTimer()
				start := time.Now()
				removed, err := sweep(s)
				elapsed += time.Since(start)
				b.StopTimer()
				if err != nil || removed != n {
					b.Fatalf("swept %d of %d: %v", removed, n, err)
				}
				s.Close()
				b.StartTimer()
			}
			b.ReportMetric(float64(elapsed.Nanoseconds())/float64(b.N*n), "ns/expired-entity")
		}
		b.Run(fmt.Sprintf("index/expired=%d", n), func(b *testing.B) {
			timed(b, func(s *store.Store) {
				tb := store.NewTable(s, "e", ttl, decodeLrec)
				tb.PeekLast = peekLrec
			}, func(s *store.Store) (int, error) {
				removed, err := s.Sweep(w)
				if err == nil {
					err = s.Commit(store.Mark{Watermark: w})
				}
				return removed, err
			})
		})
		b.Run(fmt.Sprintf("naive-scan/expired=%d", n), func(b *testing.B) {
			timed(b, func(*store.Store) {}, func(s *store.Store) (int, error) { return naiveSweep(s.DB(), w, ttl) })
		})
	}
}

// naiveSweep deletes every record of table "e" idle for ttl at w by a
// full scan (it leaves the expiry index alone: a baseline, not a fix).
func naiveSweep(db *pebble.DB, w, ttl int64) (int, error) {
	lower := store.RecordKey(nil, "e", "")
	upper := append([]byte(nil), lower...)
	upper[len(upper)-1]++
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: lower, UpperBound: upper})
	if err != nil {
		return 0, err
	}
	batch := db.NewBatch()
	defer batch.Close()
	n := 0
	for ok := it.First(); ok; ok = it.Next() {
		r, err := decodeLrec(it.Value())
		if err != nil {
			it.Close()
			return n, err
		}
		if r.last+ttl <= w {
			if err := batch.Delete(it.Key(), nil); err != nil {
				it.Close()
				return n, err
			}
			n++
		}
	}
	if err := it.Close(); err != nil {
		return n, err
	}
	return n, batch.Commit(pebble.Sync)
}

// settle flushes the records replayed from the log at open into sstables,
// where records of long-idle entities live, so that the timed sweep does
// not share the machine with that flush.
func settle(b *testing.B, s *store.Store) {
	if err := s.DB().Flush(); err != nil {
		b.Fatal(err)
	}
}
