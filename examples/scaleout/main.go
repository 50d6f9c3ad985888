// Command scaleout shows several instances sharing the work of one feature
// pipeline through a partitioned log: an in-process Kafka-protocol cluster
// on loopback, three instances started as separate processes, one of them
// killed (SIGKILL, no clean hand-over) and a fourth added mid-stream. Each
// instance prints the partitions it takes over and hands away; at the end
// the output topic is checked: every payment's row exactly once.
//
//	go run ./examples/scaleout
//
// The scenario is invented: payments at a made-up marketplace, keyed by
// account.
package main

import (
	"bufio"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"log"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"os/signal"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/twmb/franz-go/pkg/kfake"
	"github.com/twmb/franz-go/pkg/kgo"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/scaleout"
)

type payment struct {
	ID      string  `json:"id"`
	At      int64   `json:"at"`
	Account string  `json:"account"`
	Amount  float64 `json:"amount"`
}

const (
	inTopic  = "payments"
	outTopic = "payment-features"
	parts    = 6
)

// The parent starts each instance as a copy of its own executable with
// these variables set.
const (
	envMember    = "SCALEOUT_EXAMPLE_MEMBER"
	envBrokers   = "SCALEOUT_EXAMPLE_BROKERS"
	envSnapshots = "SCALEOUT_EXAMPLE_SNAPSHOTS"
)

func main() {
	log.SetFlags(0)
	maybeRunMember()
	events := flag.Int("events", 30000, "payments to produce")
	flag.Parse()
	if err := runDemo(*events); err != nil {
		log.Fatal(err)
	}
}

// maybeRunMember runs an instance and exits, in a process the parent
// started; otherwise it returns.
func maybeRunMember() {
	name := os.Getenv(envMember)
	if name == "" {
		return
	}
	if err := runMember(name, strings.Split(os.Getenv(envBrokers), ","), os.Getenv(envSnapshots)); err != nil {
		log.Fatalf("%s: %v", name, err)
	}
	os.Exit(0)
}

// runMember is one instance: it scores the partitions it owns until
// SIGTERM, then hands them over cleanly.
func runMember(name string, brokers []string, snaps string) error {
	dir, err := os.MkdirTemp("", "scaleout-"+name+"-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(dir)
	spec := tallyward.Spec[payment]{
		Time: func(p payment) int64 { return p.At },
		Entities: []tallyward.Entity[payment]{{
			Name: "account", Key: func(p payment) string { return p.Account },
			Features: []tallyward.Feature[payment]{
				{Name: "pays_10m", Kind: tallyward.SlidingCount{Window: 10 * time.Minute, Resolution: 10 * time.Second}},
				{Name: "spend_1h", Kind: tallyward.SlidingSum{Window: time.Hour, Resolution: time.Minute}, Value: func(p payment) float64 { return p.Amount }},
			},
		}},
	}
	m, err := scaleout.NewMember(scaleout.Config[payment]{
		Name:    name,
		Brokers: brokers, Group: "payment-scorers", Topic: inTopic,
		Decode: func(r *kgo.Record) (payment, error) {
			var p payment
			return p, json.Unmarshal(r.Value, &p)
		},
		Spec:            spec,
		Options:         tallyward.Options{CommitEvery: -1, MemTableBytes: 4 << 20},
		Dir:             dir,
		Snapshots:       scaleout.DirSnapshots{Root: snaps},
		OutputTopic:     outTopic,
		TransactionalID: "scorer-" + name,
		CommitRecords:   2000,
		Encode: func(_ scaleout.Partition, r tallyward.Row[payment]) ([]byte, []byte) {
			return []byte(r.Event.ID), fmt.Appendf(nil, "%d %g", int64(r.Values[0]), r.Values[1])
		},
		ClientOpts: []kgo.Opt{
			kgo.SessionTimeout(2 * time.Second), kgo.HeartbeatInterval(200 * time.Millisecond),
			kgo.TransactionTimeout(4 * time.Second), kgo.FetchMaxWait(100 * time.Millisecond),
		},
		OnChange: func(c scaleout.Change) {
			switch {
			case c.What == scaleout.Assigned && c.FromSnapshot:
				fmt.Printf("takes over %s from the snapshot at offset %d (%v)\n", c.Part, c.Head, c.Took.Round(time.Millisecond))
			case c.What == scaleout.Assigned:
				fmt.Printf("takes over %s, new, from its first offset\n", c.Part)
			case c.Head < 0:
				fmt.Printf("hands %s away (%s), nothing committed yet\n", c.Part, c.What)
			default:
				fmt.Printf("hands %s away (%s), committed at offset %d\n", c.Part, c.What, c.Head)
			}
		},
	})
	if err != nil {
		return err
	}
	ctx, stop := signal.NotifyContext(context.Background(), syscall.SIGTERM, os.Interrupt)
	defer stop()
	runErr := m.Run(ctx)
	closeErr := m.Close(context.Background())
	st := m.Stats()
	fmt.Printf("stops: consumed %d records, %d commits, %d aborted, %d partitions taken from snapshots\n", st.Consumed, st.Commits, st.Aborted, st.Loaded)
	if runErr != nil {
		return runErr
	}
	return closeErr
}

// instance is a child process running runMember.
type instance struct {
	name string
	cmd  *exec.Cmd
	done chan struct{}
}

func startInstance(name string, brokers []string, snaps string) (*instance, error) {
	cmd := exec.Command(os.Args[0])
	cmd.Env = append(os.Environ(), envMember+"="+name, envBrokers+"="+strings.Join(brokers, ","), envSnapshots+"="+snaps)
	out, err := cmd.StdoutPipe()
	if err != nil {
		return nil, err
	}
	cmd.Stderr = cmd.Stdout
	if err := cmd.Start(); err != nil {
		return nil, err
	}
	in := &instance{name: name, cmd: cmd, done: make(chan struct{})}
	go func() {
		relay(name, out)
		cmd.Wait()
		close(in.done)
	}()
	return in, nil
}

var printMu sync.Mutex

func say(format string, a ...any) {
	printMu.Lock()
	defer printMu.Unlock()
	fmt.Printf(format+"\n", a...)
}

func relay(name string, r io.Reader) {
	sc := bufio.NewScanner(r)
	for sc.Scan() {
		say("  [%s] %s", name, sc.Text())
	}
}

func runDemo(n int) error {
	cluster, err := kfake.NewCluster(kfake.NumBrokers(1), kfake.SeedTopics(parts, inTopic), kfake.SeedTopics(1, outTopic),
		kfake.GroupMinSessionTimeout(time.Second))
	if err != nil {
		return err
	}
	defer cluster.Close()
	brokers := cluster.ListenAddrs()
	snaps, err := os.MkdirTemp("", "scaleout-snapshots-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(snaps)
	say("cluster on %s; topic %q with %d partitions keyed by account; snapshots in %s", strings.Join(brokers, ","), inTopic, parts, snaps)

	prod, err := kgo.NewClient(kgo.SeedBrokers(brokers...), kgo.DefaultProduceTopic(inTopic))
	if err != nil {
		return err
	}
	defer prod.Close()
	rows := newRowCounter(brokers)
	defer rows.close()

	pays := invent(n)
	produce := func(ps []payment) error {
		rs := make([]*kgo.Record, len(ps))
		for i, p := range ps {
			b, _ := json.Marshal(p)
			rs[i] = &kgo.Record{Key: []byte(p.Account), Value: b}
		}
		return prod.ProduceSync(context.Background(), rs...).FirstErr()
	}

	insts := map[string]*instance{}
	for _, name := range []string{"a", "b", "c"} {
		if insts[name], err = startInstance(name, brokers, snaps); err != nil {
			return err
		}
	}
	third := len(pays) / 3
	say("-- three instances; producing %d payments", third)
	if err := produce(pays[:third]); err != nil {
		return err
	}
	rows.waitFor(third)
	say("-- %d rows out; killing b (SIGKILL: no commit, no hand-over) and producing %d more", third, third)
	insts["b"].cmd.Process.Kill()
	<-insts["b"].done
	if err := produce(pays[third : 2*third]); err != nil {
		return err
	}
	rows.waitFor(2 * third)
	say("-- %d rows out; adding d and producing the rest", 2*third)
	if insts["d"], err = startInstance("d", brokers, snaps); err != nil {
		return err
	}
	if err := produce(pays[2*third:]); err != nil {
		return err
	}
	rows.waitFor(len(pays))
	say("-- every row out; stopping a, c and d cleanly")
	for _, name := range []string{"a", "c", "d"} {
		insts[name].cmd.Process.Signal(syscall.SIGTERM)
	}
	for _, name := range []string{"a", "c", "d"} {
		<-insts[name].done
	}
	// The output topic has one partition: once a marker written now is
	// read, so is every row committed before it.
	if err := prod.ProduceSync(context.Background(), &kgo.Record{Topic: outTopic, Key: []byte("end")}).FirstErr(); err != nil {
		return err
	}
	rows.waitFor(len(pays) + 1)
	distinct, total := rows.counts()
	distinct, total = distinct-1, total-1 // the marker
	if distinct != len(pays) || total != len(pays) {
		return fmt.Errorf("%d payments, but %d rows read committed with %d distinct ids", len(pays), total, distinct)
	}
	say("-- %d payments, %d rows read committed, %d distinct ids: each payment's row exactly once", len(pays), total, distinct)
	return nil
}

func invent(n int) []payment {
	r := rand.New(rand.NewPCG(7, 7))
	z := rand.NewZipf(r, 1.2, 1, 4999)
	at := time.Date(2026, 3, 1, 9, 0, 0, 0, time.UTC).UnixNano()
	ps := make([]payment, n)
	for i := range ps {
		at += int64(r.IntN(int(200 * time.Millisecond)))
		ps[i] = payment{ID: fmt.Sprintf("pay-%06d", i), At: at, Account: fmt.Sprintf("acct-%04d", z.Uint64()), Amount: math.Round(r.ExpFloat64()*3000) / 100}
	}
	return ps
}

// rowCounter reads the output topic, read committed, counting rows by id.
type rowCounter struct {
	mu     sync.Mutex
	seen   map[string]int
	total  int
	notify chan struct{}
	cancel context.CancelFunc
	done   chan struct{}
}

func newRowCounter(brokers []string) *rowCounter {
	rc := &rowCounter{seen: map[string]int{}, notify: make(chan struct{}), done: make(chan struct{})}
	cl, err := kgo.NewClient(kgo.SeedBrokers(brokers...), kgo.ConsumeTopics(outTopic),
		kgo.ConsumeResetOffset(kgo.NewOffset().AtStart()), kgo.FetchIsolationLevel(kgo.ReadCommitted()))
	if err != nil {
		log.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	rc.cancel = cancel
	go func() {
		defer close(rc.done)
		defer cl.Close()
		for ctx.Err() == nil {
			fs := cl.PollFetches(ctx)
			rc.mu.Lock()
			fs.EachRecord(func(r *kgo.Record) {
				rc.seen[string(r.Key)]++
				rc.total++
			})
			close(rc.notify)
			rc.notify = make(chan struct{})
			rc.mu.Unlock()
		}
	}()
	return rc
}

func (rc *rowCounter) counts() (distinct, total int) {
	rc.mu.Lock()
	defer rc.mu.Unlock()
	return len(rc.seen), rc.total
}

func (rc *rowCounter) waitFor(n int) {
	for {
		rc.mu.Lock()
		d, ch := len(rc.seen), rc.notify
		rc.mu.Unlock()
		if d >= n {
			return
		}
		select {
		case <-ch:
		case <-time.After(2 * time.Minute):
			log.Fatalf("only %d of %d rows after two minutes", d, n)
		}
	}
}

func (rc *rowCounter) close() { rc.cancel(); <-rc.done }
