package metrics_test

import (
	"context"
	"errors"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	dto "github.com/prometheus/client_model/go"
	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/metrics"
)

type payment struct {
	T      int64
	Card   string
	Amount float64
}

const t0 = int64(1_800_000_000) * int64(time.Second)

type fixed int64

func (c fixed) Now() int64 { return int64(c) }

func open(t *testing.T, opts tallyward.Options) *tallyward.Live[payment] {
	t.Helper()
	p, err := tallyward.Open(tallyward.Spec[payment]{
		Time: func(e payment) int64 { return e.T },
		Entities: []tallyward.Entity[payment]{{
			Name: "card", Key: func(e payment) string { return e.Card },
			Features: []tallyward.Feature[payment]{
				{Name: "spent_1h", Kind: tallyward.SlidingSum{Window: time.Hour}, Value: func(e payment) float64 { return e.Amount }},
			},
		}},
	}, opts)
	require.NoError(t, err)
	t.Cleanup(func() { p.Close() })
	return tallyward.NewLive(p, fixed(t0))
}

func gather(t *testing.T, reg *prometheus.Registry) map[string][]*dto.Metric {
	t.Helper()
	mfs, err := reg.Gather()
	require.NoError(t, err)
	out := map[string][]*dto.Metric{}
	for _, mf := range mfs {
		out[mf.GetName()] = mf.GetMetric()
	}
	return out
}

func value(m *dto.Metric) float64 {
	switch {
	case m.Counter != nil:
		return m.Counter.GetValue()
	case m.Gauge != nil:
		return m.Gauge.GetValue()
	}
	return math.NaN()
}

// The counters agree with a tally of what was sent, kept by the test
// independently of the pipeline.
func TestCountersMatchEventsSent(t *testing.T) {
	live := open(t, tallyward.Options{MaxDisorder: time.Second, CommitEvery: 100})
	reg := prometheus.NewRegistry()
	reg.MustRegister(metrics.New(live, metrics.Options{}))

	ctx := context.Background()
	var sent, applied, late, zero, bad int
	cards := map[string]bool{}
	for i := range 1000 {
		e := payment{T: t0 + int64(i)*int64(time.Second), Card: []string{"c1", "c2", "c3", "c4"}[i%4], Amount: 5}
		switch {
		case i%97 == 0:
			e.T = 0
			zero++
		case i%89 == 0:
			e.Amount = math.NaN()
			bad++
		case i%83 == 0:
			e.T -= int64(10 * time.Second) // behind the watermark by 9 s
			late++
		default:
			applied++
			cards[e.Card] = true
		}
		sent++
		err := live.Submit(ctx, e)
		require.True(t, err == nil || errors.Is(err, tallyward.ErrRejected) || errors.Is(err, tallyward.ErrLate), "%v", err)
	}
	require.NoError(t, live.Commit(ctx, nil))

	m := gather(t, reg)
	require.Equal(t, float64(sent), value(m["tallyward_events_total"][0]))
	require.Equal(t, float64(applied), value(m["tallyward_events_applied_total"][0]))
	require.Equal(t, float64(late), value(m["tallyward_events_late_total"][0]))
	require.Equal(t, float64(len(cards)), value(m["tallyward_live_entities"][0]))
	rej := map[string]float64{}
	for _, mm := range m["tallyward_events_rejected_total"] {
		rej[mm.GetLabel()[0].GetValue()] = value(mm)
	}
	require.Equal(t, map[string]float64{"zero-time": float64(zero), "bad-value": float64(bad), "future-time": 0}, rej)

	newest := t0 + 999*int64(time.Second)
	require.Equal(t, float64(newest)/1e9, value(m["tallyward_newest_event_time_seconds"][0]))
	require.Equal(t, float64(newest-int64(time.Second))/1e9, value(m["tallyward_watermark_seconds"][0]))
	require.Equal(t, 1.0, value(m["tallyward_watermark_lag_seconds"][0]))

	st := live.Stats()
	h := m["tallyward_commit_duration_seconds"][0].GetHistogram()
	var timed uint64
	for _, c := range st.CommitCounts {
		timed += c
	}
	// Automatic commits every 100 events plus the explicit one.
	require.Equal(t, uint64(sent/100+1), timed)
	require.Equal(t, timed, h.GetSampleCount())
	require.Equal(t, st.TotalCommitDuration.Seconds(), h.GetSampleSum())
	hits, misses := value(m["tallyward_cache_hits_total"][0]), value(m["tallyward_cache_misses_total"][0])
	require.InDelta(t, hits/(hits+misses), value(m["tallyward_cache_hit_ratio"][0]), 1e-12)
}

// Names and help texts pass Prometheus's own linter (client_golang's
// testutil/promlint), which checks the published naming conventions
// (prometheus.io, "Metric and label naming": base units, _total on
// counters, no reserved suffixes on gauges).
func TestMetricNamesPassPromlint(t *testing.T) {
	live := open(t, tallyward.Options{})
	require.NoError(t, live.Submit(context.Background(), payment{T: t0, Card: "c", Amount: 1}))
	reg := prometheus.NewPedanticRegistry()
	reg.MustRegister(metrics.New(live, metrics.Options{ConstLabels: prometheus.Labels{"pipeline": "payments"}}))
	problems, err := testutil.GatherAndLint(reg)
	require.NoError(t, err)
	require.Empty(t, problems)
}

// Before any event the time gauges are absent rather than a misleading
// number; after a flush the watermark reads +Inf.
func TestTimeGaugesBeforeAndAfter(t *testing.T) {
	live := open(t, tallyward.Options{})
	reg := prometheus.NewRegistry()
	reg.MustRegister(metrics.New(live, metrics.Options{Namespace: "fraud"}))
	m := gather(t, reg)
	require.NotContains(t, m, "fraud_watermark_seconds")
	require.NotContains(t, m, "fraud_watermark_lag_seconds")
	require.NotContains(t, m, "fraud_cache_hit_ratio")
	require.NoError(t, live.Submit(context.Background(), payment{T: t0, Card: "c", Amount: 1}))
	require.NoError(t, live.Flush(context.Background()))
	m = gather(t, reg)
	require.True(t, math.IsInf(value(m["fraud_watermark_seconds"][0]), 1))
	for name := range m {
		require.True(t, strings.HasPrefix(name, "fraud_"), name)
	}
}
