package metrics_test

import (
	"context"
	"fmt"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/metrics"
)

// Register a collector for your own pipeline; serve the registry with
// promhttp.HandlerFor as usual.
func ExampleNew() {
	p, err := tallyward.Open(tallyward.Spec[payment]{
		Time: func(e payment) int64 { return e.T },
		Entities: []tallyward.Entity[payment]{{
			Name: "card", Key: func(e payment) string { return e.Card },
			Features: []tallyward.Feature[payment]{{Name: "payments_1h", Kind: tallyward.SlidingCount{Window: time.Hour}}},
		}},
	}, tallyward.Options{})
	if err != nil {
		panic(err)
	}
	live := tallyward.NewLive(p, tallyward.SystemClock{})
	defer live.Close()

	reg := prometheus.NewRegistry()
	reg.MustRegister(metrics.New(live, metrics.Options{ConstLabels: prometheus.Labels{"pipeline": "payments"}}))

	now := time.Now().UnixNano()
	for i := range 3 {
		live.Submit(context.Background(), payment{T: now + int64(i), Card: "card-7"})
	}
	live.Submit(context.Background(), payment{T: 0, Card: "card-7"}) // rejected: zero time

	err = testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP tallyward_events_applied_total Events applied to state.
# TYPE tallyward_events_applied_total counter
tallyward_events_applied_total{pipeline="payments"} 3
# HELP tallyward_events_rejected_total Events rejected before reaching state, by reason.
# TYPE tallyward_events_rejected_total counter
tallyward_events_rejected_total{pipeline="payments",reason="bad-value"} 0
tallyward_events_rejected_total{pipeline="payments",reason="future-time"} 0
tallyward_events_rejected_total{pipeline="payments",reason="zero-time"} 1
`), "tallyward_events_applied_total", "tallyward_events_rejected_total")
	fmt.Println(err)
	// Output: <nil>
}
