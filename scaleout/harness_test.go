package scaleout

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kfake"
	"github.com/twmb/franz-go/pkg/kgo"

	"github.com/tallyward/tallyward"
)

// payment is the invented event of these tests: a card payment at a
// shop, naming an account and a device.
type payment struct {
	ID      string  `json:"id"`
	At      int64   `json:"at"`
	Account string  `json:"account"`
	Device  string  `json:"device"`
	Amount  float64 `json:"amount"`
}

var t0 = time.Date(2026, 3, 1, 9, 0, 0, 0, time.UTC).UnixNano()

// payments draws n payments in time order over accounts and devices with
// skewed popularity (seeded).
func payments(seed uint64, n, accounts, devices int) []payment {
	return paymentsEvery(seed, n, accounts, devices, 2*time.Second)
}

// paymentsEvery is payments with gaps drawn uniformly below step.
func paymentsEvery(seed uint64, n, accounts, devices int, step time.Duration) []payment {
	r := rand.New(rand.NewPCG(seed, 1))
	za := rand.NewZipf(r, 1.2, 1, uint64(accounts-1))
	zd := rand.NewZipf(r, 1.2, 1, uint64(devices-1))
	out := make([]payment, n)
	at := t0
	for i := range out {
		at += int64(r.IntN(int(step)))
		out[i] = payment{
			ID:      fmt.Sprintf("pay-%06d", i),
			At:      at,
			Account: fmt.Sprintf("acct-%04d", za.Uint64()),
			Device:  fmt.Sprintf("dev-%04d", zd.Uint64()),
			Amount:  math.Round(r.ExpFloat64()*4000) / 100,
		}
	}
	return out
}

func accountSpec() tallyward.Spec[payment] {
	return tallyward.Spec[payment]{
		Time: func(p payment) int64 { return p.At },
		Entities: []tallyward.Entity[payment]{{
			Name: "account", Key: func(p payment) string { return p.Account },
			Features: []tallyward.Feature[payment]{
				{Name: "pays_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}},
				{Name: "spend_1h", Kind: tallyward.SlidingSum{Window: time.Hour, Resolution: time.Minute}, Value: func(p payment) float64 { return p.Amount }},
				{Name: "devices_1h", Kind: tallyward.Distinct{Window: time.Hour}, Item: func(p payment) string { return p.Device }},
				{Name: "since_last", Kind: tallyward.Recency{}},
			},
		}},
	}
}

func deviceSpec() tallyward.Spec[payment] {
	return tallyward.Spec[payment]{
		Time: func(p payment) int64 { return p.At },
		Entities: []tallyward.Entity[payment]{{
			Name: "device", Key: func(p payment) string { return p.Device },
			Features: []tallyward.Feature[payment]{
				{Name: "accounts_1h", Kind: tallyward.Distinct{Window: time.Hour}, Item: func(p payment) string { return p.Account }},
				{Name: "pays_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}},
			},
		}},
	}
}

// itemKey is shared by every store of a test so that item hashes, and so
// distinct counts, agree across partitions and with the reference.
var itemKey = []byte("0123456789abcdef")

func pipelineOptions() tallyward.Options {
	return tallyward.Options{ItemKey: itemKey, CommitEvery: -1, CacheBytes: 8 << 20, MemTableBytes: 1 << 20, BlockCacheBytes: 1 << 20}
}

// outRow is an output record: the event's id and its features.
type outRow struct {
	ID   string   `json:"id"`
	Part int32    `json:"part"`
	At   int64    `json:"at"`
	Bits []uint64 `json:"bits"` // math.Float64bits of each value: JSON has no NaN or Inf
}

func encodeRow(part Partition, r tallyward.Row[payment]) (key, value []byte) {
	o := outRow{ID: r.Event.ID, Part: part.Partition, At: r.Time}
	for _, v := range r.Values {
		o.Bits = append(o.Bits, math.Float64bits(v))
	}
	b, _ := json.Marshal(o)
	return []byte(r.Event.ID), b
}

func decodePayment(r *kgo.Record) (payment, error) {
	var p payment
	err := json.Unmarshal(r.Value, &p)
	return p, err
}

// reference runs the events through one in-memory pipeline, in the order
// given: the single-instance replay the scaled-out runs must equal.
func reference(t testing.TB, spec tallyward.Spec[payment], evs []payment) map[string][]float64 {
	return referenceWith(t, spec, pipelineOptions(), evs)
}

// referenceWith is reference with the given options; held rows are
// flushed at the end (Settled).
func referenceWith(t testing.TB, spec tallyward.Spec[payment], opts tallyward.Options, evs []payment) map[string][]float64 {
	t.Helper()
	want := map[string][]float64{}
	spec.Emit = func(r tallyward.Row[payment]) { want[r.Event.ID] = append([]float64(nil), r.Values...) }
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	for _, e := range evs {
		if err := p.Process(e); err != nil && !errors.Is(err, tallyward.ErrRejected) {
			t.Fatal(err)
		}
	}
	if err := p.Flush(); err != nil {
		t.Fatal(err)
	}
	return want
}

// cluster is an in-process Kafka-protocol cluster with an input topic of
// parts partitions and a one-partition output topic (one partition keeps
// a total order, so reading up to a marker reads everything before it).
type cluster struct {
	t       testing.TB
	c       *kfake.Cluster
	addrs   []string
	in, out string
	group   string
	parts   int32
	snaps   DirSnapshots
	prod    *kgo.Client
}

func newCluster(t testing.TB, parts int32, more ...kfake.Opt) *cluster {
	t.Helper()
	c, err := kfake.NewCluster(append([]kfake.Opt{kfake.NumBrokers(1), kfake.SeedTopics(parts, "payments"), kfake.SeedTopics(1, "rows")}, more...)...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(c.Close)
	cl := &cluster{t: t, c: c, addrs: c.ListenAddrs(), in: "payments", out: "rows", group: "scorers", parts: parts, snaps: DirSnapshots{Root: t.TempDir()}}
	cl.prod, err = kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.DefaultProduceTopic(cl.in), kgo.RecordPartitioner(kgo.StickyKeyPartitioner(nil)))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(cl.prod.Close)
	return cl
}

// produce writes events keyed by key, in order, and waits for them.
func (cl *cluster) produce(evs []payment, key func(payment) string) {
	cl.t.Helper()
	rs := make([]*kgo.Record, len(evs))
	for i, e := range evs {
		b, _ := json.Marshal(e)
		rs[i] = &kgo.Record{Key: []byte(key(e)), Value: b}
	}
	if err := cl.prod.ProduceSync(context.Background(), rs...).FirstErr(); err != nil {
		cl.t.Fatal(err)
	}
}

// running is a member whose Run loop runs in a goroutine.
type running struct {
	m      *Member[payment]
	cancel context.CancelFunc
	done   chan error
}

type memberOpt func(*Config[payment])

func (cl *cluster) start(name string, opts ...memberOpt) *running {
	cl.t.Helper()
	cfg := Config[payment]{
		Name:            name,
		Brokers:         cl.addrs,
		Group:           cl.group,
		Topic:           cl.in,
		Decode:          decodePayment,
		Spec:            accountSpec(),
		Options:         pipelineOptions(),
		Dir:             cl.t.TempDir(),
		Snapshots:       cl.snaps,
		OutputTopic:     cl.out,
		Encode:          encodeRow,
		TransactionalID: "tx-" + name,
		CommitRecords:   400,
		IdleCommit:      50 * time.Millisecond,
		MaxPollRecords:  200,
		ClientOpts:      fastGroup(),
	}
	for _, o := range opts {
		o(&cfg)
	}
	m, err := NewMember(cfg)
	if err != nil {
		cl.t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &running{m: m, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- m.Run(ctx) }()
	return r
}

// fastGroup shortens the group's timers so rebalances finish quickly on
// the in-process cluster; nothing in the tests depends on their values.
func fastGroup() []kgo.Opt {
	return []kgo.Opt{
		kgo.HeartbeatInterval(100 * time.Millisecond),
		kgo.SessionTimeout(6 * time.Second),
		kgo.RebalanceTimeout(10 * time.Second),
		kgo.FetchMaxWait(50 * time.Millisecond),
	}
}

// stop ends a member cleanly: its Run loop, then Close (commit, leave).
func (r *running) stop(t testing.TB) {
	t.Helper()
	r.cancel()
	if err := <-r.done; err != nil {
		t.Fatalf("%s: run: %v", r.m.cfg.Name, err)
	}
	if err := r.m.Close(context.Background()); err != nil {
		t.Fatalf("%s: close: %v", r.m.cfg.Name, err)
	}
}

// kill ends a member as a crash would.
func (r *running) kill(t testing.TB) {
	t.Helper()
	r.cancel()
	if err := <-r.done; err != nil {
		t.Fatalf("%s: run: %v", r.m.cfg.Name, err)
	}
	r.m.abandon(context.Background())
}

// reader follows the output topic (read committed) and counts rows by id.
type reader struct {
	mu     sync.Mutex
	cond   chan struct{} // closed and replaced on every new row
	rows   map[string][][]float64
	at     map[string]int64
	total  int
	marker bool
	cl     *kgo.Client
	stopc  chan struct{}
	done   chan struct{}
}

func (cl *cluster) follow(topic string) *reader {
	cl.t.Helper()
	c, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.ConsumeTopics(topic),
		kgo.ConsumeResetOffset(kgo.NewOffset().AtStart()), kgo.FetchIsolationLevel(kgo.ReadCommitted()),
		kgo.FetchMaxWait(50*time.Millisecond))
	if err != nil {
		cl.t.Fatal(err)
	}
	rd := &reader{cond: make(chan struct{}), rows: map[string][][]float64{}, at: map[string]int64{}, cl: c, stopc: make(chan struct{}), done: make(chan struct{})}
	ctx, cancel := context.WithCancel(context.Background())
	go func() { <-rd.stopc; cancel() }()
	go func() {
		defer close(rd.done)
		for ctx.Err() == nil {
			fs := c.PollFetches(ctx)
			rd.mu.Lock()
			fs.EachRecord(func(r *kgo.Record) {
				if string(r.Key) == "end-marker" {
					rd.marker = true
					return
				}
				var o outRow
				if err := json.Unmarshal(r.Value, &o); err != nil {
					panic(err)
				}
				vs := make([]float64, len(o.Bits))
				for i, b := range o.Bits {
					vs[i] = math.Float64frombits(b)
				}
				rd.rows[o.ID] = append(rd.rows[o.ID], vs)
				rd.at[o.ID] = o.At
				rd.total++
			})
			close(rd.cond)
			rd.cond = make(chan struct{})
			rd.mu.Unlock()
		}
	}()
	cl.t.Cleanup(func() { close(rd.stopc); <-rd.done; c.Close() })
	return rd
}

// waitFor waits until ok holds for the rows read, failing after timeout.
func (rd *reader) waitFor(t testing.TB, what string, timeout time.Duration, ok func(distinct, total int, marker bool) bool) {
	t.Helper()
	deadline := time.NewTimer(timeout)
	defer deadline.Stop()
	for {
		rd.mu.Lock()
		d, n, mk, ch := len(rd.rows), rd.total, rd.marker, rd.cond
		rd.mu.Unlock()
		if ok(d, n, mk) {
			return
		}
		select {
		case <-ch:
		case <-deadline.C:
			t.Fatalf("timed out waiting for %s: %d distinct rows, %d in all", what, d, n)
		}
	}
}

// finish writes a marker after every member has stopped and reads up to
// it: the output topic has one partition, so every row committed before
// has then been read.
func (cl *cluster) finish(rd *reader) {
	cl.finishTopic(rd, cl.out)
}

func (cl *cluster) finishTopic(rd *reader, topic string) {
	cl.t.Helper()
	if err := cl.prod.ProduceSync(context.Background(), &kgo.Record{Topic: topic, Key: []byte("end-marker")}).FirstErr(); err != nil {
		cl.t.Fatal(err)
	}
	rd.waitFor(cl.t, "the end marker", time.Minute, func(_, _ int, marker bool) bool { return marker })
}

// checkRows asserts that the rows read equal want: every event's row
// once, none missing, none twice, values equal bit for bit.
// expectAll waits for a row of every wanted event, stops the members,
// reads the output to its end and checks the rows against want.
func (cl *cluster) expectAll(t testing.TB, rd *reader, want map[string][]float64, members ...*running) {
	t.Helper()
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	for _, m := range members {
		m.stop(t)
	}
	cl.finish(rd)
	checkRows(t, rd, want)
}

func checkRows(t testing.TB, rd *reader, want map[string][]float64) {
	t.Helper()
	rd.mu.Lock()
	defer rd.mu.Unlock()
	var lost, twice, differ int
	for id, w := range want {
		got := rd.rows[id]
		switch {
		case len(got) == 0:
			lost++
			continue
		case len(got) > 1:
			twice++
		}
		if !sameBits(got[0], w) {
			if differ < 3 {
				t.Errorf("%s: got %v, single instance %v", id, got[0], w)
			}
			differ++
		}
	}
	extra := 0
	for id := range rd.rows {
		if _, ok := want[id]; !ok {
			extra++
		}
	}
	if lost+twice+differ+extra > 0 {
		t.Fatalf("against the single-instance replay of %d events: %d lost, %d emitted more than once, %d differ, %d unknown", len(want), lost, twice, differ, extra)
	}
}
