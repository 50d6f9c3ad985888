package scaleout

import (
	"context"
	"flag"
	"fmt"
	"io/fs"
	"path/filepath"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
)

// Figures, with a baseline in the same run:
//
//	go test ./scaleout/ -run '^$' -bench Throughput -benchtime 30000x
//	go test ./scaleout/ -run '^$' -bench Handover -benchtime 1x -scaleout.entities 1000000
//
// Compare runs with benchstat (golang.org/x/perf/cmd/benchstat) over
// -count 6 of each.

var handoverEntities = flag.Int("scaleout.entities", 100_000, "entities in the partition BenchmarkHandover hands over")

// BenchmarkThroughput: events per second through one pipeline fed
// directly (the single-process baseline) and through members of a group
// on the in-process cluster, which add decoding, fetching, snapshots at
// each commit and (transactional) output records.
func BenchmarkThroughput(b *testing.B) {
	evs := func(n int) []payment { return payments(21, n, 20000, 5000) }
	b.Run("single", func(b *testing.B) {
		evs := evs(b.N)
		spec := accountSpec()
		spec.Emit = func(tallyward.Row[payment]) {}
		opts := pipelineOptions()
		opts.Dir = b.TempDir()
		opts.CommitEvery = 10000
		p, err := tallyward.Open(spec, opts)
		if err != nil {
			b.Fatal(err)
		}
		defer p.Close()
		b.ResetTimer()
		for i := range b.N {
			if err := p.Process(evs[i]); err != nil {
				b.Fatal(err)
			}
		}
		if err := p.Commit(nil); err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "events/s")
	})
	for _, tc := range []struct {
		name    string
		members int
		txn     bool
		every   int
	}{
		{"member/plain", 1, false, 10000},
		{"member/transactional", 1, true, 10000},
		{"member/transactional/commit=50k", 1, true, 50000},
		{"members=2/transactional", 2, true, 10000},
	} {
		b.Run(tc.name, func(b *testing.B) {
			cl := newCluster(b, 6)
			cl.produce(evs(b.N), byAccount)
			b.ResetTimer()
			var rs []*running
			for i := range tc.members {
				rs = append(rs, cl.start(fmt.Sprint("m", i), func(c *Config[payment]) {
					c.CommitRecords = tc.every
					c.MaxPollRecords = 2000
					if !tc.txn {
						c.TransactionalID = ""
					}
				}))
			}
			waitCond(b, "every event consumed", func() bool {
				var n int64
				for _, r := range rs {
					n += r.m.Stats().Consumed
				}
				return n >= int64(b.N)
			})
			b.StopTimer()
			for _, r := range rs {
				r.stop(b)
			}
			rate := float64(b.N) / b.Elapsed().Seconds()
			b.ReportMetric(rate, "events/s")
			b.ReportMetric(rate/float64(tc.members), "events/s/instance")
		})
	}
}

// BenchmarkHandover: the time a new owner takes to have a partition of
// *handoverEntities entities ready (copy the snapshot from shared storage,
// open it, apply the next event) against rebuilding the state by
// replaying the partition's history (one event per entity) into an empty
// store, measured in the same run.
func BenchmarkHandover(b *testing.B) {
	n := *handoverEntities
	evs := make([]payment, n)
	for i := range evs {
		evs[i] = payment{ID: fmt.Sprint(i), At: t0 + int64(i)*int64(time.Millisecond), Account: fmt.Sprintf("acct-%08d", i), Device: fmt.Sprintf("dev-%d", i%5000), Amount: 1}
	}
	next := payment{ID: "next", At: evs[n-1].At + 1, Account: "acct-00000001", Device: "dev-1", Amount: 1}
	spec := accountSpec()
	open := func(dir string) *tallyward.Pipeline[payment] {
		opts := pipelineOptions()
		opts.Dir = dir
		opts.CacheBytes = 256 << 20
		opts.MemTableBytes = 64 << 20
		p, err := tallyward.Open(spec, opts)
		if err != nil {
			b.Fatal(err)
		}
		return p
	}
	feed := func(p *tallyward.Pipeline[payment]) {
		for _, e := range evs {
			if err := p.Process(e); err != nil {
				b.Fatal(err)
			}
		}
	}
	snaps := DirSnapshots{Root: b.TempDir()}
	part := Partition{"payments", 0}
	src := open(b.TempDir())
	feed(src)
	if err := snaps.Save(context.Background(), part, int64(n), src.Snapshot); err != nil {
		b.Fatal(err)
	}
	src.Close()
	var size int64
	filepath.WalkDir(snaps.name(part, int64(n)), func(_ string, d fs.DirEntry, _ error) error {
		if info, err := d.Info(); err == nil && !d.IsDir() {
			size += info.Size()
		}
		return nil
	})

	b.Run(fmt.Sprintf("snapshot/entities=%d", n), func(b *testing.B) {
		for range b.N {
			dst := filepath.Join(b.TempDir(), "p")
			if err := snaps.Load(context.Background(), part, int64(n), dst); err != nil {
				b.Fatal(err)
			}
			p := open(dst)
			if err := p.Process(next); err != nil {
				b.Fatal(err)
			}
			b.StopTimer()
			p.Close()
			b.StartTimer()
		}
		b.ReportMetric(float64(size)/float64(n), "snapshot-B/entity")
		b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/handover")
	})
	b.Run(fmt.Sprintf("replay/entities=%d", n), func(b *testing.B) {
		for range b.N {
			p := open(b.TempDir())
			feed(p)
			if err := p.Process(next); err != nil {
				b.Fatal(err)
			}
			b.StopTimer()
			p.Close()
			b.StartTimer()
		}
		b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/handover")
	})
}
