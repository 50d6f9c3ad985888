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
			owned := 0
			for _, r := range rs {
				owned += len(r.m.Owned())
			}
			if owned > int(cl.parts) {
				t.Errorf("%d partitions owned by %d members, more than the %d there are", owned, members, cl.parts)
			}
			for _, r := range rs {
				r.stop(t)
				if o := r.m.Owned(); len(o) != 0 {
					t.Errorf("%s still owns %v after Close", r.m.cfg.Name, o)
				}
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
	cl.expectAll(t, rd, want, b, c)
	if c.m.Stats().Loaded == 0 {
		t.Errorf("the added member took no partition over from a snapshot: %+v", c.m.Stats())
	}
}

func TestMemberKilledWithoutRevoke(t *testing.T) {
	evs := payments(12, 4500, 400, 300)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 6)
	rd := cl.follow(cl.out)
	a, b, c := cl.start("a"), cl.start("b"), cl.start("c")
	half := len(evs) / 2
	cl.produce(evs[:half-200], byAccount)
	// Kill b once it has committed some work and consumed more since: the
	// work after its last commit is lost with it and must be redone by
	// the next owner, whose rows must not repeat b's committed ones.
	killHolding(t, b, func() { cl.produce(evs[half-200:half], byAccount) }, nil)
	cl.produce(evs[half:], byAccount)
	cl.expectAll(t, rd, want, a, c)
	t.Logf("killed b: %+v; a: %+v; c: %+v", b.m.Stats(), a.m.Stats(), c.m.Stats())
}

// killHolding kills b while it holds work it has not committed, after a
// commit of its own: it waits for b's first commit (and for ready, if not
// nil, to hold for one of b's partitions), calls more to produce records
// (fewer than b commits by count), waits until b has consumed some of them
// and kills it. b commits when idle for IdleCommit (50 ms): the condition
// holds for at least that long, and waitCond looks every 2 ms.
func killHolding(t testing.TB, b *running, more func(), ready func(*part[payment]) bool) {
	t.Helper()
	waitCond(t, "b to commit", func() bool {
		b.m.mu.Lock()
		defer b.m.mu.Unlock()
		if b.m.stats.Commits == 0 {
			return false
		}
		for _, pt := range b.m.parts {
			if ready == nil || ready(pt) {
				return true
			}
		}
		return false
	})
	more()
	waitCond(t, "b to hold uncommitted work", func() bool {
		b.m.mu.Lock()
		defer b.m.mu.Unlock()
		return b.m.pending > 0
	})
	b.kill(t)
}

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
	a, b := cl.start("a", plain), cl.start("b", plain)
	third := len(evs) / 3
	cl.produce(evs[:third], byAccount)
	rd.waitFor(t, "the first rows", 2*time.Minute, func(d, _ int, _ bool) bool { return d > third/2 })
	c := cl.start("c", plain)
	cl.produce(evs[third:2*third], byAccount)
	rd.waitFor(t, "the second third", 2*time.Minute, func(d, _ int, _ bool) bool { return d == 2*third })
	a.stop(t)
	cl.produce(evs[2*third:len(evs)-200], byAccount)
	killHolding(t, b, func() { cl.produce(evs[len(evs)-200:], byAccount) }, nil)
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
	want := referenceWith(t, accountSpec(), settled, evs)

	cl := newCluster(t, 4)
	rd := cl.follow(cl.out)
	withSettled := func(c *Config[payment]) { c.Options = settled }
	a := cl.start("a", withSettled)
	b := cl.start("b", withSettled)
	half := len(evs) / 2
	cl.produce(evs[:half-200], byAccount)
	// b's committed state must hold events (resume before head), so the
	// next owner has to read them again.
	killHolding(t, b, func() { cl.produce(evs[half-200:half], byAccount) }, func(pt *part[payment]) bool {
		c, err := decodeCursor(pt.p.Cursor())
		return err == nil && c.resume < c.head && c.head == pt.confirmed
	})
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
	cl.expectAll(t, rd, want, a, c)
	t.Logf("killed b: %+v; a: %+v; c: %+v", b.m.Stats(), a.m.Stats(), c.m.Stats())
}

// Offsets need not be dense: transaction markers, records of aborted
// transactions (skipped by read-committed members) and records Decode
// refuses all take offsets without taking sequence numbers. A member
// killed among them must hand over at the right offsets.
func TestOffsetGapsAcrossHandOver(t *testing.T) {
	evs := payments(19, 3000, 300, 200)
	cl := newCluster(t, 4)
	txp, err := kgo.NewClient(kgo.SeedBrokers(cl.addrs...), kgo.DefaultProduceTopic(cl.in), kgo.TransactionalID("input-writer"))
	if err != nil {
		t.Fatal(err)
	}
	defer txp.Close()
	var kept []payment
	batch := func(evs []payment, commit bool) {
		t.Helper()
		if err := txp.BeginTransaction(); err != nil {
			t.Fatal(err)
		}
		for i, e := range evs {
			b, _ := json.Marshal(e)
			switch {
			case i%97 == 0:
				b = []byte("not json") // refused by Decode, every read
			case i%89 == 0:
				e.At = 0 // rejected by the pipeline (zero time), every read
				b, _ = json.Marshal(e)
				if commit {
					kept = append(kept, e)
				}
			}
			txp.Produce(context.Background(), &kgo.Record{Key: []byte(e.Account), Value: b}, nil)
			if commit && i%97 != 0 && i%89 != 0 {
				kept = append(kept, e)
			}
		}
		if err := txp.Flush(context.Background()); err != nil {
			t.Fatal(err)
		}
		if err := txp.EndTransaction(context.Background(), kgo.TransactionEndTry(commit)); err != nil {
			t.Fatal(err)
		}
	}
	rd := cl.follow(cl.out)
	a, b := cl.start("a"), cl.start("b")
	const chunk = 250
	for i := 0; i < len(evs)/2-chunk; i += chunk {
		batch(evs[i:i+chunk], (i/chunk)%3 != 2)
	}
	killHolding(t, b, func() { batch(evs[len(evs)/2-chunk:len(evs)/2], true) }, nil)
	c := cl.start("c")
	for i := len(evs) / 2; i < len(evs); i += chunk {
		batch(evs[i:i+chunk], (i/chunk)%3 != 2)
	}
	want := reference(t, accountSpec(), kept) // no rows for rejected events
	rd.waitFor(t, "every kept row", 2*time.Minute, func(d, _ int, _ bool) bool { return d == len(want) })
	a.stop(t)
	c.stop(t)
	cl.finish(rd)
	checkRows(t, rd, want)
	t.Logf("%d of %d events kept; killed b: %+v; a: %+v; c: %+v", len(kept), len(evs), b.m.Stats(), a.m.Stats(), c.m.Stats())
}

// A plain member idle between polls, holding work it has not committed,
// commits each partition it is asked to give up inside the revoke (state,
// then that partition's group offset), so even without transactions a
// clean hand-over repeats no row.
func TestPlainRevokeCommitsPendingWork(t *testing.T) {
	evs := payments(20, 2000, 300, 200)
	want := reference(t, accountSpec(), evs)
	cl := newCluster(t, 4)
	rd := cl.follow(cl.out)
	holding := func(c *Config[payment]) {
		c.TransactionalID, c.IdleCommit, c.CommitRecords = "", time.Hour, 1<<30
	}
	a := cl.start("a", holding)
	half := len(evs) / 2
	cl.produce(evs[:half], byAccount)
	rd.waitFor(t, "the first half", 2*time.Minute, func(d, _ int, _ bool) bool { return d == half })
	if st := a.m.Stats(); st.Commits != 0 {
		t.Fatalf("a committed before the rebalance: %+v", st)
	}
	b := cl.start("b", func(c *Config[payment]) { c.TransactionalID = "" })
	waitCond(t, "b to take partitions over from a's snapshots", func() bool { return b.m.Stats().Loaded > 0 })
	cl.produce(evs[half:], byAccount)
	cl.expectAll(t, rd, want, a, b)
}
