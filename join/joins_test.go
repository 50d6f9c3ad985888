package join

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/attach"
)

// spanGap is the mean gap that makes a history of n events span about
// days days (genHistory makes about 1.35 events per step).
func spanGap(n int, days int64) int64 { return days * day * 135 / 100 / int64(n) }

func settled(disorder int64) tallyward.Options {
	return tallyward.Options{Mode: tallyward.Settled, MaxDisorder: time.Duration(disorder)}
}

// Settled join output depends only on the events (invariant 2,
// DESIGN.md): 20 seeded arrival orders within MaxDisorder give the same
// outputs of all three joins, in the same order, bit for bit.
func TestSettledJoinsIndependentOfArrivalOrder(t *testing.T) {
	n := 30_000
	if testing.Short() {
		n = 6_000
	}
	h := genHistory(7, n, 300, spanGap(n, 40))
	disorder := 5 * minute
	run := func(evs []act) *outputs {
		o := newOutputs()
		j := collect(t, settled(disorder), o)
		defer j.p.Close()
		require.NoError(t, j.p.Replay(context.Background(), source(evs)))
		require.Zero(t, j.p.Stats().Late)
		return o
	}
	want := run(h.evs)
	counts := map[byte]int{}
	for _, k := range want.order {
		counts[k[0]]++
	}
	require.Positive(t, counts['L'])
	require.Positive(t, counts['I'])
	require.Positive(t, counts['A'])
	for seed := range uint64(20) {
		got := run(shuffleWithin(rand.New(rand.NewPCG(seed, 99)), h.evs, disorder))
		// Each join numbers its own outputs (Seq), so equal maps mean equal
		// outputs in equal order; how the three streams interleave is not
		// part of the contract.
		require.Equal(t, want.lines, got.lines, "seed %d", seed)
	}
	t.Logf("%d events: %d training rows, %d interval matches, %d as-of outputs, identical under 20 shuffles",
		len(h.evs), counts['L'], counts['I'], counts['A'])
}

type fakeClock struct{ now int64 }

func (c *fakeClock) Now() int64 { return c.now }

// Replay equals live (invariant 1): the same sequence through Replay and
// through Live from 4 goroutines (fake clock) gives the same join outputs,
// for the Settled joins on a Settled pipeline and for the Eager variants
// on an Eager pipeline.
func TestJoinsReplayEqualsLive(t *testing.T) {
	for _, eager := range []bool{false, true} {
		t.Run(fmt.Sprintf("eager=%v", eager), func(t *testing.T) { replayEqualsLive(t, eager) })
	}
}

func replayEqualsLive(t *testing.T, eager bool) {
	n := 30_000
	if testing.Short() {
		n = 6_000
	}
	h := genHistory(8, n, 300, spanGap(n, 40))
	disorder := 5 * minute
	evs := shuffleWithin(rand.New(rand.NewPCG(3, 3)), h.evs, disorder)

	opts := settled(disorder)
	opts.PastSkew = 90 * 24 * time.Hour // the history spans 40 days behind the fake clock
	if eager {
		opts.Mode = tallyward.Eager
	}
	want := newOutputs()
	j := collectVariant(t, opts, eager, want)
	require.NoError(t, j.p.Replay(context.Background(), source(evs)))
	require.NoError(t, j.p.Close())

	got := newOutputs()
	j = collectVariant(t, opts, eager, got)
	l := tallyward.NewLive(j.p, &fakeClock{now: h.end + hour})
	var wg sync.WaitGroup
	errs := make([]error, 4)
	for g := range 4 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := g; i < len(evs); i += 4 {
				if err := l.SubmitInOrder(context.Background(), uint64(i), evs[i]); err != nil && errs[g] == nil {
					errs[g] = fmt.Errorf("event %d: %w", i, err)
				}
			}
		}()
	}
	wg.Wait()
	require.Equal(t, make([]error, 4), errs)
	require.NoError(t, l.Flush(context.Background()))
	require.NoError(t, l.Close())
	require.NotEmpty(t, want.lines)
	require.Equal(t, want.lines, got.lines)
}

// Bounded state (invariant 6): over 90 simulated days at a steady rate,
// the label join holds a flat number of events (and bytes) once the
// maturity window is full, and its stored keys are exactly the held ones
// (expired entries are deleted, not left behind).
func TestJoinStateBoundedOver90Days(t *testing.T) {
	n, gap := 150_000, int64(70*time.Second)
	if testing.Short() {
		n, gap = 20_000, int64(525*time.Second)
	}
	h := genHistory(9, n, 2000, gap)
	require.Greater(t, h.end-base, 89*day)
	disorder := 5 * minute
	j := openJoined(t, settled(disorder), funcSink(func(*TrainingRow) error { return nil }), func(Match[act]) {}, func(Attached[act]) {})
	defer j.p.Close()
	type sample struct {
		held, bytes, ivHeld, aoPoints int
	}
	var days []sample
	nextDay := base + day
	for _, e := range h.evs {
		for e.T >= nextDay {
			ls, is, as := j.lj.Stats(), j.iv.Stats(), j.ao.Stats()
			days = append(days, sample{ls.Held, ls.HeldBytes, is.HeldLeft + is.HeldRight, as.Points})
			nextDay += day
		}
		require.NoError(t, j.p.Process(e))
	}
	full := int(maturity/time.Duration(day)) + 2 // window full, with a day of margin
	steady := days[full:]
	mean := func(f func(sample) int) float64 {
		s := 0
		for _, d := range steady {
			s += f(d)
		}
		return float64(s) / float64(len(steady))
	}
	for _, c := range []struct {
		name string
		f    func(sample) int
	}{{"held events", func(s sample) int { return s.held }}, {"held bytes", func(s sample) int { return s.bytes }}} {
		m := mean(c.f)
		lo := slices.MinFunc(steady, func(a, b sample) int { return c.f(a) - c.f(b) })
		hi := slices.MaxFunc(steady, func(a, b sample) int { return c.f(a) - c.f(b) })
		t.Logf("%s from day %d to %d: mean %.0f, min %d, max %d", c.name, full, len(days), m, c.f(lo), c.f(hi))
		require.InDelta(t, m, float64(c.f(lo)), 0.1*m, "%s dips more than 10%% below the mean", c.name)
		require.InDelta(t, m, float64(c.f(hi)), 0.1*m, "%s rises more than 10%% above the mean", c.name)
	}
	last := days[len(days)-1]
	t.Logf("last day: interval join holds %d events, as-of join %d values; %d bytes per held training event",
		last.ivHeld, last.aoPoints, last.bytes/max(last.held, 1))

	require.NoError(t, j.p.Commit(nil))
	st, ok := attach.Store(j.p)
	require.True(t, ok)
	stored := 0
	require.NoError(t, st.ScanPart("label.training", func(k, v []byte) error { stored++; return nil }))
	require.Equal(t, j.lj.Stats().Held+2, stored, "stored keys = held events + the meta and definition keys")
}
