package bench

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

// eventClock is the live driver's clock in BenchmarkLive: the newest event
// time handed out, as if the traffic were real.
type eventClock struct{ now atomic.Int64 }

func (c *eventClock) Now() int64 { return c.now.Load() }

func (c *eventClock) advance(t int64) {
	for {
		n := c.now.Load()
		if t <= n || c.now.CompareAndSwap(n, t) {
			return
		}
	}
}

// BenchmarkLive runs the six-feature workload through Live.Score on disk
// (Eager) from 1, 2 and 4 goroutines that take the next event of the
// stream in turn, one pass per b.N from a new store; 16 goroutines stand
// for a service's request handlers. The stream's order
// is kept up to the goroutines' interleaving, which MaxDisorder (10 min,
// far more than the events' spacing) absorbs; an event late all the same
// is counted, not fatal. Reported: events/s and late events per pass;
// compare g2, g4 and g16 with g1 (same run) for what concurrency buys.
func BenchmarkLive(b *testing.B) {
	data := featureEvents()
	for _, g := range []int{1, 2, 4, 16} {
		b.Run(fmt.Sprintf("g%d", g), func(b *testing.B) {
			var late uint64
			var cpu time.Duration
			for range b.N {
				b.StopTimer()
				opts := tallyward.Options{Dir: b.TempDir(), MaxDisorder: 10 * time.Minute, CacheBytes: featureCacheBytes(), Workers: *benchWorkers}
				p, err := tallyward.Open(featureSpec(nil), opts)
				if err != nil {
					b.Fatal(err)
				}
				clock := &eventClock{}
				clock.now.Store(data.events[0].T)
				live := tallyward.NewLive(p, clock)
				var next atomic.Int64
				var wg sync.WaitGroup
				errs := make(chan error, g)
				ctx := context.Background()
				var m memDelta
				m.start()
				b.StartTimer()
				for range g {
					wg.Add(1)
					go func() {
						defer wg.Done()
						var out []float64
						for {
							i := int(next.Add(1) - 1)
							if i >= len(data.events) {
								return
							}
							e := data.events[i]
							clock.advance(e.T)
							var err error
							if out, err = live.Score(ctx, e, out[:0]); err != nil && !errors.Is(err, tallyward.ErrLate) {
								errs <- err
								return
							}
						}
					}()
				}
				wg.Wait()
				b.StopTimer()
				cpu += m.cpuSince()
				close(errs)
				for err := range errs {
					b.Fatal(err)
				}
				late += live.Stats().Late
				if err := live.Close(); err != nil {
					b.Fatal(err)
				}
				b.StartTimer()
			}
			b.ReportMetric(float64(b.N)*float64(len(data.events))/b.Elapsed().Seconds(), "events/s")
			b.ReportMetric(float64(late)/float64(b.N), "late")
			// CPU per event (every goroutine: the callers, the commit's,
			// Pebble's and the GC's) against wall time per event says how
			// many cores the pass kept busy.
			b.ReportMetric(float64(cpu.Nanoseconds())/float64(b.N*len(data.events)), "cpu-ns/event")
			b.ReportMetric(cpu.Seconds()/b.Elapsed().Seconds(), "cores")
		})
	}
}
