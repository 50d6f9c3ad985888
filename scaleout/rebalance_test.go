package scaleout

import (
	"context"
	"sync"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kerr"
	"github.com/twmb/franz-go/pkg/kmsg"
)

// gatedSnapshots holds the first Save after arm until release is closed,
// so a test can make the group rebalance while a commit is under way.
type gatedSnapshots struct {
	Snapshots
	mu       sync.Mutex
	armed    bool
	entered  chan struct{}
	release  chan struct{}
	tripOnce sync.Once
}

func (g *gatedSnapshots) Save(ctx context.Context, p Partition, head int64, write func(string) error) error {
	g.mu.Lock()
	armed := g.armed
	g.armed = false
	g.mu.Unlock()
	if armed {
		close(g.entered)
		<-g.release
	}
	return g.Snapshots.Save(ctx, p, head, write)
}

func TestRebalanceDuringCommit(t *testing.T) {
	evs := payments(13, 3000, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	gate := &gatedSnapshots{Snapshots: cl.snaps, entered: make(chan struct{}), release: make(chan struct{})}
	a := cl.start("a", func(c *Config[payment]) { c.Snapshots = gate })
	half := len(evs) / 2
	cl.produce(evs[:half], byAccount)
	rd.waitFor(t, "some rows", 2*time.Minute, func(d, _ int, _ bool) bool { return d > 0 })
	gate.mu.Lock()
	gate.armed = true
	gate.mu.Unlock()
	cl.produce(evs[half:], byAccount)
	waitChan(t, "a commit to start", gate.entered)
	// a is inside its commit, holding its poll: b's join starts a
	// rebalance that must wait for it.
	b := cl.start("b")
	waitCond(t, "the rebalance to wait on a's commit", a.m.blocked.Load)
	close(gate.release)
	cl.expectAll(t, rd, want, a, b)
	t.Logf("a: %+v; b: %+v", a.m.Stats(), b.m.Stats())
}

// TestCommitRefusedByGroup makes the group coordinator refuse a
// transaction's offsets as a rebalance does (REBALANCE_IN_PROGRESS): the
// transaction aborts, and the member must roll its partitions back to
// their last committed snapshots and redo the work, neither losing the
// aborted rows nor emitting them twice.
func TestCommitRefusedByGroup(t *testing.T) {
	evs := payments(14, 3000, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	a, b := cl.start("a"), cl.start("b")
	half := len(evs) / 2
	cl.produce(evs[:half], byAccount)
	rd.waitFor(t, "some rows", 2*time.Minute, func(d, _ int, _ bool) bool { return d > 0 })
	refused := make(chan struct{})
	cl.c.ControlKey(int16(kmsg.TxnOffsetCommit), func(kr kmsg.Request) (kmsg.Response, error, bool) {
		req := kr.(*kmsg.TxnOffsetCommitRequest)
		resp := req.ResponseKind().(*kmsg.TxnOffsetCommitResponse)
		resp.Version = req.Version
		for _, rt := range req.Topics {
			st := kmsg.NewTxnOffsetCommitResponseTopic()
			st.Topic = rt.Topic
			for _, rp := range rt.Partitions {
				sp := kmsg.NewTxnOffsetCommitResponseTopicPartition()
				sp.Partition = rp.Partition
				sp.ErrorCode = kerr.RebalanceInProgress.Code
				st.Partitions = append(st.Partitions, sp)
			}
			resp.Topics = append(resp.Topics, st)
		}
		close(refused)
		return resp, nil, true
	})
	cl.produce(evs[half:], byAccount)
	waitChan(t, "a commit to be refused", refused)
	cl.expectAll(t, rd, want, a, b)
	if a.m.Stats().Aborted+b.m.Stats().Aborted == 0 {
		t.Errorf("no commit was aborted: a %+v, b %+v", a.m.Stats(), b.m.Stats())
	}
	t.Logf("a: %+v; b: %+v", a.m.Stats(), b.m.Stats())
}

func waitChan(t testing.TB, what string, ch <-chan struct{}) {
	t.Helper()
	select {
	case <-ch:
	case <-time.After(time.Minute):
		t.Fatalf("timed out waiting for %s", what)
	}
}
