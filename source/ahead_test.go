package source_test

import (
	"errors"
	"math/rand/v2"
	"sync/atomic"
	"testing"

	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

// TestAheadEqualsDirectRead: read through Ahead, with cursors taken on
// the consuming goroutine while the reader runs ahead (as a commit hook
// takes them), a reader yields the events of a direct read in order, tells
// the same bad rows, and every cursor reopens at the right event.
func TestAheadEqualsDirectRead(t *testing.T) {
	n := 2000
	if testing.Short() {
		n = 500
	}
	dir := t.TempDir()
	paths := fiveFiles(t, dir, n)
	s := schema(t)
	opts := source.Options{MaxDisorder: 60e9, MaxBadRows: -1}
	r, err := source.Open(paths, s, opts, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	all := readAll(t, r, -1)
	bad := r.BadRows()
	r.Close()

	var told atomic.Int64
	opts.OnBadRow = func(*source.RowError) { told.Add(1) }
	r, err = source.Open(paths, s, opts, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	rng := rand.New(rand.NewPCG(5, 6))
	type taken struct {
		seq uint64
		cur []byte
	}
	var cursors []taken
	var got []specfile.Event
	var last uint64
	for ev, err := range source.Ahead(r.Events()) {
		if err != nil {
			t.Fatal(err)
		}
		got = append(got, ev)
		if rng.IntN(400) == 0 {
			seq := max(last, uint64(len(got))-uint64(rng.IntN(50)))
			cur, err := r.CursorAt(seq)
			if err != nil {
				t.Fatal(err)
			}
			cursors = append(cursors, taken{seq, cur})
			last = seq
			r.Progress()
		}
	}
	sameEvents(t, got, all)
	if bad == 0 || told.Load() != bad || r.BadRows() != bad {
		t.Fatalf("%d bad rows told, %d counted, want %d", told.Load(), r.BadRows(), bad)
	}
	if len(cursors) < 3 {
		t.Fatalf("only %d cursors taken", len(cursors))
	}
	for _, c := range cursors {
		r2, err := source.Open(paths, s, source.Options{MaxDisorder: 60e9, MaxBadRows: -1}, c.cur, c.seq)
		if err != nil {
			t.Fatal(err)
		}
		sameEvents(t, readAll(t, r2, -1), all[c.seq:])
		r2.Close()
	}
}

// TestAheadStopsAndPassesErrors: an error reaches the consumer in its
// place and ends the sequence; a consumer that stops early finds the
// source ended (not read further) when Ahead returns.
func TestAheadStopsAndPassesErrors(t *testing.T) {
	boom := errors.New("boom")
	var read atomic.Int64
	var ended atomic.Bool
	src := func(failAt int) func(yield func(int, error) bool) {
		return func(yield func(int, error) bool) {
			defer ended.Store(true)
			for i := 0; i < 10_000; i++ {
				read.Add(1)
				var err error
				if i == failAt {
					err = boom
				}
				if !yield(i, err) || err != nil {
					return
				}
			}
		}
	}
	var seen []int
	var gotErr error
	for v, err := range source.Ahead(src(1234)) {
		if err != nil {
			gotErr = err
			continue
		}
		seen = append(seen, v)
	}
	if !errors.Is(gotErr, boom) || len(seen) != 1234 || seen[1233] != 1233 {
		t.Fatalf("error %v after %d values", gotErr, len(seen))
	}

	ended.Store(false)
	read.Store(0)
	k := 0
	for range source.Ahead(src(-1)) {
		if k++; k == 300 {
			break
		}
	}
	if !ended.Load() {
		t.Fatal("Ahead returned while its source was still being read")
	}
	if n := read.Load(); n >= 10_000 {
		t.Fatalf("the source was read to its end (%d) after the consumer stopped", n)
	}
}
