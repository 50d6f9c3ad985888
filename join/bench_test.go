package join

import (
	"context"
	"math/rand/v2"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/attach"
)

// Join throughput against a same-run baseline, the same Settled pipeline
// without joins (read the ratio, not the absolute figures), and the
// memory and stored bytes per held training event:
//
//	go test ./join/ -run '^$' -bench Join -benchtime 3x
//
// benchstat recipe: add -count 6 on two revisions and compare the files.
func BenchmarkJoin(b *testing.B) {
	const n = 100_000
	h := genHistory(5, n, 2000, spanGap(n, 40))
	evs := shuffleWithin(rand.New(rand.NewPCG(5, 5)), h.evs, 2*minute)
	opts := settled(2 * minute)
	opts.CommitEvery = -1
	// Only feeding is timed; opening, and the commit that Close makes,
	// are not (the commit of everything held is reported apart, as
	// commit-ms: a real run commits every CommitEvery events instead).
	replay := func(b *testing.B, open func() *tallyward.Pipeline[act]) *tallyward.Pipeline[act] {
		var p *tallyward.Pipeline[act]
		var cpu time.Duration
		b.ReportAllocs()
		b.ResetTimer()
		for range b.N {
			b.StopTimer()
			if p != nil {
				p.Close()
			}
			p = open()
			c0 := cpuTime()
			b.StartTimer()
			require.NoError(b, p.Feed(context.Background(), source(evs)))
			b.StopTimer()
			cpu += cpuTime() - c0
			b.StartTimer()
		}
		b.StopTimer()
		b.ReportMetric(float64(len(evs))*float64(b.N)/b.Elapsed().Seconds(), "events/s")
		// Process CPU time (user + system, every goroutine) is what a
		// loaded shared machine distorts least.
		b.ReportMetric(float64(cpu.Nanoseconds())/float64(len(evs)*b.N), "cpu-ns/event")
		b.ReportMetric(0, "ns/op")
		b.Cleanup(func() { p.Close() })
		return p
	}
	b.Run("baseline-no-join", func(b *testing.B) {
		replay(b, func() *tallyward.Pipeline[act] {
			spec := richSpec()
			spec.Emit = func(tallyward.Row[act]) {}
			p, err := tallyward.Open(spec, opts)
			require.NoError(b, err)
			return p
		})
	})
	b.Run("labels", func(b *testing.B) {
		var lj *Labels[act]
		p := replay(b, func() *tallyward.Pipeline[act] {
			p, j, err := OpenLabels(richSpec(), opts, actLabels(maturity, funcSink(func(*TrainingRow) error { return nil })))
			require.NoError(b, err)
			lj = j
			return p
		})
		st := lj.Stats()
		b.ReportMetric(float64(st.HeldBytes)/float64(st.Held), "mem-B/held")
		began := time.Now()
		require.NoError(b, p.Commit(nil))
		b.ReportMetric(float64(time.Since(began).Milliseconds()), "commit-ms")
		b.ReportMetric(float64(st.Held), "held")
		s, _ := attach.Store(p)
		stored := 0
		require.NoError(b, s.ScanPart("label.training", func(k, v []byte) error { stored += len(k) + len(v); return nil }))
		b.ReportMetric(float64(stored)/float64(st.Held), "stored-B/held")
	})
	b.Run("all-three", func(b *testing.B) {
		replay(b, func() *tallyward.Pipeline[act] {
			j := openJoined(b, opts, funcSink(func(*TrainingRow) error { return nil }), func(Match[act]) {}, func(Attached[act]) {})
			return j.p
		})
	})
}

func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
