package scaleout

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kfake"
	"github.com/twmb/franz-go/pkg/kgo"

	"github.com/tallyward/tallyward"
)

// TestTwoEntityTopology runs the topology of an event naming an account
// and a device: account features on the topic keyed by account, a
// re-keying step to a topic keyed by device, device features there, and
// the two partial rows of each event met again by event id. The met rows
// must equal one Settled pipeline computing both entities' features over
// all events.
func TestTwoEntityTopology(t *testing.T) {
	const disorder = 20 * time.Minute
	// ~10 minutes of events: the re-keying step interleaves the account
	// partitions in no set order, and the device pipelines absorb that
	// within MaxDisorder.
	evs := paymentsEvery(16, 3000, 400, 300, 400*time.Millisecond)
	settled := pipelineOptions()
	settled.Mode, settled.MaxDisorder = tallyward.Settled, disorder
	both := accountSpec()
	both.Entities = append(both.Entities, deviceSpec().Entities...)
	want := referenceWith(t, both, settled, evs)

	cl := newCluster(t, 6, kfake.SeedTopics(4, "payments-by-device"), kfake.SeedTopics(1, "device-rows"))
	accRows, devRows := cl.follow("rows"), cl.follow("device-rows")
	withSpec := func(stage string, spec tallyward.Spec[payment]) memberOpt {
		return func(c *Config[payment]) {
			c.Spec, c.Options = spec, settled
			if stage == "device" {
				c.Group, c.Topic, c.OutputTopic = "device-scorers", "payments-by-device", "device-rows"
				c.TransactionalID = "tx-dev-" + c.Name
			}
		}
	}
	members := []*running{
		cl.start("acct-a", withSpec("account", accountSpec())),
		cl.start("acct-b", withSpec("account", accountSpec())),
		cl.start("dev-a", withSpec("device", deviceSpec())),
		cl.start("dev-b", withSpec("device", deviceSpec())),
	}
	rctx, stopRekey := context.WithCancel(context.Background())
	rekeyed, allMoved := make(chan error, 1), make(chan struct{})
	var movedOnce sync.Once
	go func() {
		_, err := Rekey(rctx, RekeyConfig{
			Brokers: cl.addrs, Group: "rekey", From: "payments", To: "payments-by-device",
			TransactionalID: "tx-rekey", MaxPollRecords: 300, ClientOpts: fastGroup(),
			Key: func(r *kgo.Record) ([]byte, error) {
				var p payment
				if err := json.Unmarshal(r.Value, &p); err != nil {
					return nil, err
				}
				if p.Account == "end" {
					return nil, errEndMarker // the account stage's own
				}
				return []byte(p.Device), nil
			},
			OnBatch: func(st RekeyStats) {
				if st.Moved == int64(len(evs)) {
					movedOnce.Do(func() { close(allMoved) })
				}
			},
		})
		rekeyed <- err
	}()

	cl.produce(evs, byAccount)
	// Push every partition's watermark past the last event, so Settled
	// rows are all released: one late-enough event per partition.
	end := evs[len(evs)-1].At + int64(disorder) + int64(time.Minute)
	manual, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.RecordPartitioner(kgo.ManualPartitioner()))
	if err != nil {
		t.Fatal(err)
	}
	defer manual.Close()
	ends := func(topic string, n int32) {
		t.Helper()
		var rs []*kgo.Record
		for p := range n {
			b, _ := json.Marshal(payment{ID: fmt.Sprintf("end-%s-%d", topic, p), At: end, Account: "end", Device: "end"})
			rs = append(rs, &kgo.Record{Topic: topic, Partition: p, Value: b})
		}
		if err := manual.ProduceSync(context.Background(), rs...).FirstErr(); err != nil {
			t.Fatal(err)
		}
	}
	ends("payments", 6)
	// The device topic's markers go after every re-keyed event: one
	// before them would make them late.
	waitChan(t, "every event re-keyed", allMoved)
	ends("payments-by-device", 4)
	accRows.waitFor(t, "every account row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(evs) })
	devRows.waitFor(t, "every device row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(evs) })
	stopRekey()
	if err := <-rekeyed; err != nil {
		t.Fatal(err)
	}
	for _, r := range members {
		r.stop(t)
	}
	cl.finishTopic(accRows, "rows")
	cl.finishTopic(devRows, "device-rows")

	got := map[string][]float64{}
	meet := Meeting{Parts: 2, Emit: func(id string, _ int64, parts [][]float64) {
		got[id] = slices.Concat(parts...)
	}}
	for part, rd := range []*reader{accRows, devRows} {
		rd.mu.Lock()
		for id, rows := range rd.rows {
			for _, vs := range rows {
				if err := meet.Add(id, rd.at[id], part, vs); err != nil {
					t.Fatal(err)
				}
			}
		}
		rd.mu.Unlock()
	}
	st := meet.Stats()
	if st.Repeated != 0 || st.Held != 0 || int(st.Complete) != len(want) {
		t.Fatalf("meeting: %+v, want %d complete, none repeated or held", st, len(want))
	}
	differ := 0
	for id, w := range want {
		if !sameBits(got[id], w) {
			if differ < 3 {
				t.Errorf("%s: met row %v, single pipeline %v", id, got[id], w)
			}
			differ++
		}
	}
	if differ > 0 {
		t.Fatalf("%d of %d met rows differ from the single pipeline", differ, len(want))
	}
}

var errEndMarker = errors.New("end marker")

func TestMeetingChecksParts(t *testing.T) {
	var out []string
	m := Meeting{Parts: 2, Emit: func(id string, at int64, parts [][]float64) { out = append(out, fmt.Sprint(id, " ", at, " ", parts)) }}
	must := func(err error) {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
	}
	must(m.Add("e1", 10, 1, []float64{2}))
	must(m.Add("e1", 10, 1, []float64{2})) // a repeat, equal: dropped
	if err := m.Add("e1", 10, 1, []float64{3}); err == nil {
		t.Fatal("a repeat with other values was accepted")
	}
	if err := m.Add("e1", 10, 2, nil); err == nil {
		t.Fatal("part 2 of 2 was accepted")
	}
	must(m.Add("e2", 5, 0, []float64{7}))
	must(m.Add("e1", 10, 0, []float64{1}))
	must(m.Add("e1", 10, 0, []float64{1})) // after completion: dropped
	m.Expire(8)
	want := []string{"e1 10 [[1] [2]]"}
	if !slices.Equal(out, want) {
		t.Fatalf("emitted %q, want %q", out, want)
	}
	if st := m.Stats(); st != (MeetingStats{Complete: 1, Repeated: 3, Expired: 1, Held: 0}) {
		t.Fatalf("stats %+v", st)
	}
}
