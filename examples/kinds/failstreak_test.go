package kinds

import (
	"bytes"
	"flag"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/tallyward/tallyward/kindtest"
)

// streakReference is FailStreak's definition, recomputed from the raw
// events: failures strictly after the newest success at or before asOf
// (past holds exactly the events at or before asOf).
func streakReference(past []kindtest.Event, _ int64, _ kindtest.Event) float64 {
	var lastOK int64
	success := false
	for _, e := range past {
		if e.Value == 0 && (!success || e.Time > lastOK) {
			lastOK, success = e.Time, true
		}
	}
	n := 0
	for _, e := range past {
		if e.Value != 0 && (!success || e.Time > lastOK) {
			n++
		}
	}
	return float64(n)
}

// failures draws a failure two times in three, so streaks of several
// occur and end.
func failures(r *rand.Rand) float64 {
	if r.IntN(3) == 0 {
		return 0
	}
	return 1
}

func TestFailStreakPassesHarness(t *testing.T) {
	// The default disorder (3 s on 1 s spacing) folds events soon after
	// they arrive; a wide disorder keeps long raw tails with many ties in
	// them; in order, the horizon is 1 ns and every older event is folded
	// at once.
	for name, c := range map[string]kindtest.Config{
		"disorder-3s":  {},
		"disorder-30s": {MaxDisorder: 30 * time.Second},
		"in-order":     {InOrder: true},
	} {
		t.Run(name, func(t *testing.T) {
			c.Kind, c.Reference, c.Value = FailStreak{}, streakReference, failures
			kindtest.Run(t, c)
		})
	}
}

const sec = int64(time.Second)

// goldenState is the state the golden blob holds: events up to 25 s, a
// 10 s horizon, so the first ones are folded (with a success among them)
// and the rest are raw, with ties of a success and a failure both folded
// and raw.
func goldenState() *FailStreakState {
	a := FailStreak{}.NewAggregate(10 * time.Second).(*FailStreakState)
	base := int64(1_700_000_000) * sec
	for _, e := range []struct {
		t    int64
		fail bool
	}{
		{0, true}, {1, false}, {2, true}, {2, false}, {4, true}, {9, true},
		{17, true}, {20, false}, {20, true}, {22, true}, {25, true},
	} {
		v := 0.0
		if e.fail {
			v = 1
		}
		a.Add(base+e.t*sec, v, 0)
	}
	return a
}

var update = flag.Bool("update", false, "write golden blobs that do not exist yet")

// Version 1 is pinned for good: the blob decodes, answers as its events
// define, and re-encodes to the same bytes.
func TestFailStreakGoldenV1(t *testing.T) {
	path := filepath.Join("testdata", "fail-streak-v1.bin")
	want, err := goldenState().AppendBinary(nil)
	if err != nil {
		t.Fatal(err)
	}
	if *update {
		if _, err := os.Stat(path); err == nil {
			t.Fatalf("%s exists: golden blobs are never rewritten; a new layout is a new version", path)
		}
		if err := os.WriteFile(path, want, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	blob, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(blob, want) {
		t.Fatalf("the version 1 writer changed:\n  golden %x\n  now    %x", blob, want)
	}
	a := FailStreak{}.NewAggregate(10 * time.Second).(*FailStreakState)
	if err := a.UnmarshalBinary(blob); err != nil {
		t.Fatal(err)
	}
	if !a.folded.any || !a.folded.success || len(a.tail) == 0 {
		t.Fatalf("the golden state should hold folded events with a success and a raw tail: %+v", a)
	}
	base := int64(1_700_000_000) * sec
	// By the definition, from the event list of goldenState: as of 25 s
	// the newest success is at 20 s; the failure at 20 s does not count,
	// 22 s and 25 s do. As of 19 s the newest success is at 2 s (the
	// failure at 2 s does not count; 4, 9 and 17 s do). Events up to 9 s
	// are folded, so earlier times cannot be answered.
	for _, c := range []struct {
		at   int64
		want float64
	}{{25, 2}, {24, 1}, {21, 0}, {20, 0}, {19, 3}, {17, 3}, {16, 2}, {9, 2}, {8, math.NaN()}} {
		if got := a.At(base+c.at*sec, 0); got != c.want && !(math.IsNaN(got) && math.IsNaN(c.want)) {
			t.Errorf("as of %d s: %v, want %v", c.at, got, c.want)
		}
	}
	again, _ := a.AppendBinary(nil)
	if !bytes.Equal(again, blob) {
		t.Fatalf("re-encoding differs:\n  %x\n  %x", blob, again)
	}
}

// The decoder never panics; what it accepts re-encodes to bytes it
// decodes to the same state.
func FuzzFailStreakDecode(f *testing.F) {
	if blob, err := os.ReadFile(filepath.Join("testdata", "fail-streak-v1.bin")); err == nil {
		f.Add(blob)
	}
	empty, _ := FailStreak{}.NewAggregate(time.Second).AppendBinary(nil)
	f.Add(empty)
	f.Add([]byte{1, 1, 2, 1, 0, 1})
	f.Add([]byte{1, 7, 0, 0, 0, 0, 1, 0, 0})
	f.Fuzz(func(t *testing.T, b []byte) {
		a := FailStreak{}.NewAggregate(10 * time.Second).(*FailStreakState)
		if err := a.UnmarshalBinary(b); err != nil {
			return
		}
		enc, err := a.AppendBinary(nil)
		if err != nil {
			t.Fatal(err)
		}
		c := FailStreak{}.NewAggregate(10 * time.Second).(*FailStreakState)
		if err := c.UnmarshalBinary(enc); err != nil {
			t.Fatalf("own encoding refused: %v", err)
		}
		enc2, _ := c.AppendBinary(nil)
		if !bytes.Equal(enc, enc2) {
			t.Fatalf("not stable: %x then %x", enc, enc2)
		}
		_ = a.At(a.newest, 0)
		a.Add(a.newest+1, 1, 0)
	})
}

// Beyond the horizon an event is refused rather than folded out of order,
// and nothing changes.
func TestFailStreakRefusesTooOld(t *testing.T) {
	a := FailStreak{}.NewAggregate(5 * time.Second)
	base := int64(1_700_000_000) * sec
	for _, tt := range []int64{0, 10, 11} {
		if !a.Add(base+tt*sec, 1, 0) {
			t.Fatalf("refused the event at %d s", tt)
		}
	}
	before, _ := a.AppendBinary(nil)
	if a.Add(base+6*sec, 0, 0) {
		t.Fatal("accepted a success 5 s behind the newest with a 5 s horizon")
	}
	after, _ := a.AppendBinary(nil)
	if !bytes.Equal(before, after) {
		t.Fatal("a refused event changed the state")
	}
	if got := a.At(base+11*sec, 0); got != 3 {
		t.Fatalf("streak %v, want 3", got)
	}
	if !a.Add(base+7*sec, 0, 0) {
		t.Fatal("refused a success 4 s behind the newest")
	}
	if got := a.At(base+11*sec, 0); got != 2 {
		t.Fatalf("streak after a success at 7 s: %v, want 2 (10 s and 11 s)", got)
	}
}
