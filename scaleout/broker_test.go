package scaleout

import (
	"context"
	"fmt"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kerr"
	"github.com/twmb/franz-go/pkg/kgo"
	"github.com/twmb/franz-go/pkg/kmsg"
)

// brokersEnv names the variable that points the real-broker test at a
// cluster: TALLYWARD_KAFKA_BROKERS=host:9092[,host:9092...].
const brokersEnv = "TALLYWARD_KAFKA_BROKERS"

// TestRealBroker runs members against a real Kafka-protocol cluster when
// brokersEnv is set (skipped otherwise): three members, one killed, one
// added, against the single-instance replay. It creates its own topics,
// named with the time, and deletes them at the end.
func TestRealBroker(t *testing.T) {
	addrs := os.Getenv(brokersEnv)
	if addrs == "" {
		t.Skipf("set %s to run against a real broker", brokersEnv)
	}
	suffix := fmt.Sprint(time.Now().UnixNano())
	cl := &cluster{t: t, addrs: strings.Split(addrs, ","), in: "tallyward-payments-" + suffix, out: "tallyward-rows-" + suffix,
		group: "tallyward-scorers-" + suffix, parts: 6, snaps: DirSnapshots{Root: t.TempDir()}}
	admin, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...))
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close()
	createTopics(t, admin, map[string]int32{cl.in: cl.parts, cl.out: 1})
	t.Cleanup(func() { deleteTopics(admin, cl.in, cl.out) })
	cl.prod, err = kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.DefaultProduceTopic(cl.in))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(cl.prod.Close)

	evs := payments(31, 3000, 400, 300)
	want := reference(t, accountSpec(), evs)
	rd := cl.follow(cl.out)
	a, b, c := cl.start("a-"+suffix), cl.start("b-"+suffix), cl.start("c-"+suffix)
	half := len(evs) / 2
	cl.produce(evs[:half-200], byAccount)
	killHolding(t, b, func() { cl.produce(evs[half-200:half], byAccount) }, nil)
	d := cl.start("d-" + suffix)
	cl.produce(evs[half:], byAccount)
	rd.waitFor(t, "every row", 5*time.Minute, func(n, _ int, _ bool) bool { return n == len(want) })
	for _, r := range []*running{a, c, d} {
		r.stop(t)
	}
	cl.finish(rd)
	checkRows(t, rd, want)
	for _, r := range []*running{a, b, c, d} {
		t.Logf("%s: %+v", r.m.cfg.Name, r.m.Stats())
	}
}

func createTopics(t *testing.T, cl *kgo.Client, topics map[string]int32) {
	t.Helper()
	req := kmsg.NewPtrCreateTopicsRequest()
	for name, parts := range topics {
		rt := kmsg.NewCreateTopicsRequestTopic()
		rt.Topic, rt.NumPartitions, rt.ReplicationFactor = name, parts, -1
		req.Topics = append(req.Topics, rt)
	}
	resp, err := req.RequestWith(context.Background(), cl)
	if err != nil {
		t.Fatal(err)
	}
	for _, rt := range resp.Topics {
		if err := kerr.ErrorForCode(rt.ErrorCode); err != nil {
			t.Fatalf("creating %s: %v", rt.Topic, err)
		}
	}
}

func deleteTopics(cl *kgo.Client, names ...string) {
	req := kmsg.NewPtrDeleteTopicsRequest()
	req.TopicNames = names
	for _, n := range names {
		rt := kmsg.NewDeleteTopicsRequestTopic()
		rt.Topic = kmsg.StringPtr(n)
		req.Topics = append(req.Topics, rt)
	}
	req.RequestWith(context.Background(), cl)
}
