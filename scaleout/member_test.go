package scaleout

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kgo"

	"github.com/tallyward/tallyward"
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

func TestMemberAddedAndRemovedMidStream(t *testing.T) {
	evs := payments(11, 4500, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	a, b := cl.start("a"), cl.start("b")
	third := len(evs) / 3
	cl.produce(evs[:third], byAccount)
	rd.waitFor(t, "the first third", 2*time.Minute, func(d, _ int, _ bool) bool { return d >= third/2 })
	c := cl.start("c") // added while the first third is still being consumed
	cl.produce(evs[third:2*third], byAccount)
	rd.waitFor(t, "rows of the second third", 2*time.Minute, func(d, _ int, _ bool) bool { return d >= third+third/2 })
	a.stop(t) // removed cleanly: commits and hands its partitions over
	cl.produce(evs[2*third:], byAccount)
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	b.stop(t)
	c.stop(t)
	cl.finish(rd)
	checkRows(t, rd, want)
	if c.m.Stats().Loaded == 0 {
		t.Errorf("the added member took no partition over from a snapshot: %+v", c.m.Stats())
	}
}

func TestMemberKilledWithoutRevoke(t *testing.T) {
	evs := payments(12, 4500, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	a, b, c := cl.start("a"), cl.start("b", lazy), cl.start("c")
	half := len(evs) / 2
	cl.produce(evs[:half], byAccount)
	// Kill b once it has committed some work and consumed more since: the
	// work after its last commit is lost with it and must be redone by
	// the next owner, whose rows must not repeat b's committed ones.
	waitCond(t, "b to commit and carry uncommitted work", func() bool {
		b.m.mu.Lock()
		defer b.m.mu.Unlock()
		return b.m.stats.Commits > 0 && b.m.pending > 0
	})
	b.kill(t)
	cl.produce(evs[half:], byAccount)
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	a.stop(t)
	c.stop(t)
	cl.finish(rd)
	checkRows(t, rd, want)
	t.Logf("killed b: %+v; a: %+v; c: %+v", b.m.Stats(), a.m.Stats(), c.m.Stats())
}

// lazy makes a member commit only when a rebalance waits for it or after
// 400 records, never when idle: it then holds uncommitted work a test can
// kill it with.
func lazy(c *Config[payment]) { c.IdleCommit = time.Hour }

// waitCond polls cond on a ticker (the condition lives in another
// goroutine's state, with no channel to wait on), failing after a minute.
func waitCond(t testing.TB, what string, cond func() bool) {
	t.Helper()
	tick := time.NewTicker(2 * time.Millisecond)
	defer tick.Stop()
	deadline := time.After(time.Minute)
	for !cond() {
		select {
		case <-tick.C:
		case <-deadline:
			t.Fatalf("timed out waiting for %s", what)
		}
	}
}

// Without transactions, clean hand-overs still give each row once (a
// member commits before it lets a rebalance proceed); a killed member's
// uncommitted rows are produced again by the next owner, identical, so
// nothing is lost (at-least-once).
func TestPlainMembersAtLeastOnce(t *testing.T) {
	evs := payments(15, 3000, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	plain := func(c *Config[payment]) { c.TransactionalID = "" }
	a, b := cl.start("a", plain), cl.start("b", plain, lazy)
	third := len(evs) / 3
	cl.produce(evs[:third], byAccount)
	rd.waitFor(t, "the first rows", 2*time.Minute, func(d, _ int, _ bool) bool { return d > third/2 })
	c := cl.start("c", plain)
	cl.produce(evs[third:2*third], byAccount)
	rd.waitFor(t, "the second third", 2*time.Minute, func(d, _ int, _ bool) bool { return d == 2*third })
	a.stop(t)
	cl.produce(evs[2*third:], byAccount)
	waitCond(t, "b to carry uncommitted work", func() bool {
		b.m.mu.Lock()
		defer b.m.mu.Unlock()
		return b.m.pending > 0
	})
	b.kill(t)
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	c.stop(t)
	cl.finish(rd)
	rd.mu.Lock()
	dups := 0
	for id, rows := range rd.rows {
		for _, r := range rows[1:] {
			dups++
			if !sameBits(r, rows[0]) {
				t.Errorf("%s: a repeated row differs: %v, then %v", id, rows[0], r)
			}
		}
		rd.rows[id] = rows[:1]
	}
	rd.mu.Unlock()
	checkRows(t, rd, want) // once repeats are folded
	t.Logf("%d rows repeated after the kill; b: %+v; c: %+v", dups, b.m.Stats(), c.m.Stats())
}

// A Settled pipeline holds events until the watermark passes them, so its
// snapshots resume before their head: the next owner must read the held
// events again (from the snapshot's resume offset) without counting or
// emitting them twice.
func TestSettledHandOverRereadsHeldEvents(t *testing.T) {
	evs := payments(18, 4000, 300, 200)
	settled := pipelineOptions()
	settled.Mode, settled.MaxDisorder = tallyward.Settled, 5*time.Minute
	spec := accountSpec()
	want := map[string][]float64{}
	spec.Emit = func(r tallyward.Row[payment]) { want[r.Event.ID] = append([]float64(nil), r.Values...) }
	ref, err := tallyward.Open(spec, settled)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range evs {
		if err := ref.Process(e); err != nil {
			t.Fatal(err)
		}
	}
	if err := ref.Flush(); err != nil {
		t.Fatal(err)
	}
	ref.Close()

	cl := newCluster(t, 4)
	rd := cl.follow(cl.out)
	withSettled := func(c *Config[payment]) { c.Options = settled }
	a := cl.start("a", withSettled)
	b := cl.start("b", withSettled, lazy)
	half := len(evs) / 2
	cl.produce(evs[:half], byAccount)
	waitCond(t, "b to commit while holding events, and carry uncommitted work", func() bool {
		b.m.mu.Lock()
		defer b.m.mu.Unlock()
		if b.m.stats.Commits == 0 {
			return false
		}
		for _, pt := range b.m.parts {
			if c, err := decodeCursor(pt.p.Cursor()); err == nil && c.resume < c.head && c.head == pt.confirmed && pt.dirty {
				return true
			}
		}
		return false
	})
	b.kill(t)
	c := cl.start("c", withSettled)
	cl.produce(evs[half:], byAccount)
	// One event per partition far enough ahead to release every held row.
	end := evs[len(evs)-1].At + int64(6*time.Minute)
	manual, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.RecordPartitioner(kgo.ManualPartitioner()))
	if err != nil {
		t.Fatal(err)
	}
	defer manual.Close()
	for p := range cl.parts {
		b, _ := json.Marshal(payment{ID: fmt.Sprint("end-", p), At: end, Account: "end"})
		if err := manual.ProduceSync(context.Background(), &kgo.Record{Topic: cl.in, Partition: p, Value: b}).FirstErr(); err != nil {
			t.Fatal(err)
		}
	}
	rd.waitFor(t, "every row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	a.stop(t)
	c.stop(t)
	cl.finish(rd)
	checkRows(t, rd, want)
	t.Logf("killed b: %+v; a: %+v; c: %+v", b.m.Stats(), a.m.Stats(), c.m.Stats())
}
