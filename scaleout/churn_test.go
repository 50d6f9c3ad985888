package scaleout

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kgo"

	"github.com/tallyward/tallyward"
)

var churnSteps = flag.Int("scaleout.churn", 12, "membership changes in TestMembershipChurn")

// TestMembershipChurn changes membership at seeded random points of a
// stream (a member started, stopped cleanly or killed, at least one left
// running) and checks the output against the single-instance replay, in
// both modes. Not under -short; -scaleout.churn sets the number of
// changes (and the seed).
func TestMembershipChurn(t *testing.T) {
	if testing.Short() {
		t.Skip("long: many rebalances")
	}
	for _, mode := range []tallyward.Mode{tallyward.Eager, tallyward.Settled} {
		t.Run(fmt.Sprint(mode), func(t *testing.T) { churn(t, *churnSteps, mode) })
	}
}

func churn(t *testing.T, steps int, mode tallyward.Mode) {
	r := rand.New(rand.NewPCG(uint64(steps), uint64(mode)))
	evs := payments(uint64(steps), 500*(steps+1), 500, 300)
	opts := pipelineOptions()
	opts.Mode = mode
	if mode == tallyward.Settled {
		opts.MaxDisorder = 5 * time.Minute
	}
	want := referenceWith(t, accountSpec(), opts, evs)

	cl := newCluster(t, 8)
	rd := cl.follow(cl.out)
	withMode := func(c *Config[payment]) { c.Options = opts }
	live := []*running{cl.start("m0", withMode)}
	next, killed, stopped := 1, 0, 0
	chunk := len(evs) / (steps + 1)
	for s := range steps + 1 {
		cl.produce(evs[s*chunk:min((s+1)*chunk, len(evs))], byAccount)
		if s == steps {
			break
		}
		switch k := r.IntN(3); {
		case k == 0 || len(live) == 1:
			live = append(live, cl.start(fmt.Sprint("m", next), withMode))
			next++
		default:
			i := r.IntN(len(live))
			if k == 1 {
				live[i].stop(t)
				stopped++
			} else {
				live[i].kill(t)
				killed++
			}
			live = append(live[:i], live[i+1:]...)
		}
	}
	if mode == tallyward.Settled {
		// One event per partition far enough ahead to release every row.
		manual, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.RecordPartitioner(kgo.ManualPartitioner()))
		if err != nil {
			t.Fatal(err)
		}
		defer manual.Close()
		end := evs[len(evs)-1].At + int64(opts.MaxDisorder) + int64(time.Minute)
		for p := range cl.parts {
			b, _ := json.Marshal(payment{ID: fmt.Sprint("end-", p), At: end, Account: "end"})
			if err := manual.ProduceSync(context.Background(), &kgo.Record{Topic: cl.in, Partition: p, Value: b}).FirstErr(); err != nil {
				t.Fatal(err)
			}
		}
	}
	rd.waitFor(t, "every row", 5*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	for _, m := range live {
		m.stop(t)
	}
	cl.finish(rd)
	checkRows(t, rd, want)
	t.Logf("%d events, %d members started, %d stopped cleanly, %d killed", len(evs), next, stopped, killed)
}
