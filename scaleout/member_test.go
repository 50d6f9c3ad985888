package scaleout

import (
	"testing"
	"time"
)

func byAccount(p payment) string { return p.Account }

// The scale-out contract: over any change of membership, the union of the
// rows all instances produce equals a single-instance replay of the same
// events (brute-force recomputation by one pipeline), each event's row
// exactly once.

func TestMembersShareTheWork(t *testing.T) {
	for _, members := range []int{2, 3} {
		t.Run(string(rune('0'+members))+"members", func(t *testing.T) {
			evs := payments(uint64(members), 3000, 400, 300)
			want := reference(t, accountSpec(), evs)
			cl := newCluster(t, 6)
			rd := cl.follow(cl.out)
			var rs []*running
			for i := range members {
				rs = append(rs, cl.start(string(rune('a'+i))))
			}
			cl.produce(evs, byAccount)
			rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
			for _, r := range rs {
				r.stop(t)
			}
			cl.finish(rd)
			checkRows(t, rd, want)
			owners := 0
			for _, r := range rs {
				if r.m.Stats().Consumed > 0 {
					owners++
				}
			}
			for _, r := range rs {
				t.Logf("%s owns? stats %+v", r.m.cfg.Name, r.m.Stats())
			}
			if owners < 2 {
				t.Errorf("only %d of %d members consumed anything", owners, members)
			}
		})
	}
}
