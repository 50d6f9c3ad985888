package scaleout

import (
	"flag"
	"fmt"
	"math/rand/v2"
	"testing"
	"time"
)

var churnSteps = flag.Int("scaleout.churn", 12, "membership changes in TestMembershipChurn")

// TestMembershipChurn changes membership at seeded random points of a
// stream (a member started, stopped cleanly or killed, at least one left
// running) and checks the output against the single-instance replay.
// Not under -short; -scaleout.churn sets the number of changes.
func TestMembershipChurn(t *testing.T) {
	if testing.Short() {
		t.Skip("long: many rebalances")
	}
	steps := *churnSteps
	r := rand.New(rand.NewPCG(uint64(steps), 99))
	evs := payments(uint64(steps), 500*(steps+1), 500, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 8)
	rd := cl.follow(cl.out)
	live := []*running{cl.start("m0")}
	next, killed, stopped := 1, 0, 0
	chunk := len(evs) / (steps + 1)
	for s := range steps + 1 {
		cl.produce(evs[s*chunk:min((s+1)*chunk, len(evs))], byAccount)
		if s == steps {
			break
		}
		switch k := r.IntN(3); {
		case k == 0 || len(live) == 1:
			live = append(live, cl.start(fmt.Sprint("m", next)))
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
	rd.waitFor(t, "every row", 5*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	for _, m := range live {
		m.stop(t)
	}
	cl.finish(rd)
	checkRows(t, rd, want)
	t.Logf("%d events, %d members started, %d stopped cleanly, %d killed", len(evs), next, stopped, killed)
}
