package kindtest

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"maps"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/sketch"
)

// Check numbers, so that each check draws its own streams.
const (
	chkAsOf = iota
	chkReplayLive
	chkShuffle
	chkCrash
	chkEncoding
)

var modes = [...]tallyward.Mode{tallyward.Eager, tallyward.Settled}

func open(t tb, s tallyward.Spec[ev], o tallyward.Options) *tallyward.Pipeline[ev] {
	t.Helper()
	p, err := tallyward.Open(s, o)
	if err != nil {
		t.Fatalf("kindtest: open: %v", err)
	}
	return p
}

// checkAsOf compares every row with the reference.
func checkAsOf(t tb, c *Config) {
	t.Helper()
	for _, mode := range modes {
		for i := range c.Streams {
			evs, seed := arrivals(c, chkAsOf, i)
			if msg := asOfStream(t, c, mode, evs, i%2 == 0); msg != "" {
				t.Fatalf("asof, %v mode, stream seed %d (%d events, cache %s): %s", mode, seed, len(evs), cacheName(i%2 == 0), msg)
			}
		}
	}
}

func cacheName(tiny bool) string {
	if tiny {
		return "1 byte"
	}
	return "default"
}

// asOfStream runs one stream and returns a description of the first
// mismatch, or "".
func asOfStream(t tb, c *Config, mode tallyward.Mode, evs []ev, tiny bool) string {
	t.Helper()
	byID := make([]ev, len(evs))
	for _, e := range evs {
		byID[e.ID] = e
	}
	obs := &observer{}
	perKey := map[string][]int{} // applied event IDs per key, in apply order
	consumed := 0
	var failure string
	var past []Event
	rows := 0
	emit := func(r tallyward.Row[ev]) {
		rows++
		if failure != "" {
			return
		}
		for ; consumed < len(obs.applied); consumed++ {
			e := byID[obs.applied[consumed]]
			perKey[e.Key] = append(perKey[e.Key], e.ID)
		}
		e := r.Event
		for f, name := range featureNames {
			q := e.Time
			if f == fBefore {
				q--
			}
			past = past[:0]
			for _, id := range perKey[e.Key] {
				if x := byID[id]; x.Time <= q && (f != fSome || x.pick) {
					past = append(past, x.Event)
				}
			}
			// Stable: events at one time stay in apply order.
			slices.SortStableFunc(past, func(a, b Event) int { return cmp.Compare(a.Time, b.Time) })
			want := c.Reference(past, q, e.Event)
			if got := r.Values[f]; !c.close(got, want) {
				failure = fmt.Sprintf("feature %q, event %s, as of %d: got %v, reference %v; %s",
					name, fmtEvent(e.Event), q, got, want, fmtPast(past))
				return
			}
		}
	}
	p := open(t, spec(c, emit, obs), options(c, mode, tiny))
	defer p.Close()
	if err := p.Replay(context.Background(), source(evs, 0)); err != nil {
		t.Fatalf("asof, %v mode: replay: %v", mode, err)
	}
	if failure != "" {
		return failure
	}
	s := p.Stats()
	switch {
	case rows != len(evs):
		return fmt.Sprintf("%d rows emitted for %d events", rows, len(evs))
	case s.Late != 0 || s.Applied != uint64(len(evs)):
		return fmt.Sprintf("%d events late, %d applied of %d (the harness sends none late)", s.Late, s.Applied, len(evs))
	case s.TooOld != 0:
		return fmt.Sprintf("the kind refused %d updates as too old, all within MaxDisorder of the key's newest event", s.TooOld)
	}
	return ""
}

func fmtEvent(e Event) string {
	s := fmt.Sprintf("id=%d key=%s t=%d", e.ID, e.Key, e.Time)
	if e.Item != "" {
		s += fmt.Sprintf(" item=%q", e.Item)
	}
	if e.Value != 0 {
		s += fmt.Sprintf(" value=%v", e.Value)
	}
	return s
}

// fmtPast lists the last few events the reference saw.
func fmtPast(past []Event) string {
	const show = 6
	var b strings.Builder
	fmt.Fprintf(&b, "the reference saw %d events", len(past))
	if len(past) > show {
		fmt.Fprintf(&b, ", the last %d", show)
	}
	if len(past) > 0 {
		b.WriteString(":")
	}
	for _, e := range past[max(0, len(past)-show):] {
		b.WriteString("\n    ")
		b.WriteString(fmtEvent(e))
	}
	return b.String()
}

// fakeClock is a clock that never moves.
type fakeClock struct{ now int64 }

func (c fakeClock) Now() int64 { return c.now }

// checkReplayLive compares the replay driver with the live driver fed by
// four goroutines.
func checkReplayLive(t tb, c *Config) {
	t.Helper()
	for _, mode := range modes {
		for i := range c.Streams {
			evs, seed := arrivals(c, chkReplayLive, i)
			where := fmt.Sprintf("replay-live, %v mode, stream seed %d", mode, seed)
			o := options(c, mode, i%2 == 0)

			replayed := newRowLog()
			p := open(t, spec(c, replayed.add, nil), o)
			if err := p.Replay(context.Background(), source(evs, 0)); err != nil {
				p.Close()
				t.Fatalf("%s: replay: %v", where, err)
			}
			rs := p.Stats()
			if err := p.Close(); err != nil {
				t.Fatalf("%s: close: %v", where, err)
			}

			lived := newRowLog()
			var mu sync.Mutex // rows arrive from whichever goroutine holds the core
			lp := open(t, spec(c, func(r tallyward.Row[ev]) { mu.Lock(); lived.add(r); mu.Unlock() }, nil), o)
			// The clock stands at the newest event time, so the future
			// check never fires and there is no idle advance.
			var newest int64
			for _, e := range evs {
				newest = max(newest, e.Time)
			}
			live := tallyward.NewLive(lp, fakeClock{newest})
			const workers = 4
			var wg sync.WaitGroup
			errs := make([]error, workers)
			for w := range workers {
				wg.Add(1)
				go func() {
					defer wg.Done()
					for n := w; n < len(evs); n += workers {
						if err := live.SubmitInOrder(context.Background(), uint64(n), evs[n]); err != nil && errs[w] == nil {
							errs[w] = fmt.Errorf("event %d: %w", n, err)
						}
					}
				}()
			}
			wg.Wait()
			err := errors.Join(append(errs, live.Flush(context.Background()), live.Commit(context.Background(), nil))...)
			ls := live.Stats()
			err = errors.Join(err, live.Close())
			if err != nil {
				t.Fatalf("%s: live: %v", where, err)
			}
			if !maps.Equal(replayed.rows, lived.rows) {
				t.Fatalf("%s: rows differ %s", where, firstDiff(replayed.rows, lived.rows, func() []uint64 { return seqs(len(evs)) }))
			}
			if !slices.Equal(replayed.order, lived.order) {
				t.Fatalf("%s: emission order differs", where)
			}
			if rs.Applied != ls.Applied || rs.Emitted != uint64(len(evs)) || ls.Emitted != uint64(len(evs)) {
				t.Fatalf("%s: applied %d/%d, emitted %d/%d (replay/live) of %d events", where, rs.Applied, ls.Applied, rs.Emitted, ls.Emitted, len(evs))
			}
		}
	}
}

func seqs(n int) []uint64 {
	s := make([]uint64, n)
	for i := range s {
		s[i] = uint64(i)
	}
	return s
}

func ids(n int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = i
	}
	return s
}

// checkShuffle compares Settled rows across reorderings within
// MaxDisorder.
func checkShuffle(t tb, c *Config) {
	t.Helper()
	for i := range c.Streams {
		seed := c.streamSeed(chkShuffle, i)
		inOrder := genStream(c, seed)
		run := func(evs []ev) map[int]string {
			rows := newRowLog()
			p := open(t, spec(c, rows.add, nil), options(c, tallyward.Settled, i%2 == 0))
			defer p.Close()
			if err := p.Replay(context.Background(), source(evs, 0)); err != nil {
				t.Fatalf("shuffle, stream seed %d: replay: %v", seed, err)
			}
			if s := p.Stats(); s.Late != 0 {
				t.Fatalf("shuffle, stream seed %d: %d events late (the harness sends none late)", seed, s.Late)
			}
			return rows.byID
		}
		want := run(inOrder)
		for s := range c.Shuffles {
			got := run(shuffleWithin(rand.New(rand.NewPCG(seed, uint64(s))), inOrder, c.MaxDisorder))
			if !maps.Equal(want, got) {
				t.Fatalf("shuffle, stream seed %d, shuffle %d: Settled rows depend on arrival order; by event ID %s",
					seed, s, firstDiff(want, got, func() []int { return ids(len(inOrder)) }))
			}
		}
	}
}

// dumpRecords returns every stored entity record (keys with tag 0x03, see
// internal/store) of the closed store in directory "db" of fs.
func dumpRecords(t tb, fs vfs.FS) []string {
	t.Helper()
	db, err := pebble.Open("db", &pebble.Options{FS: fs, ReadOnly: true, Logger: quiet{}})
	if err != nil {
		t.Fatalf("kindtest: reopen store to read records: %v", err)
	}
	defer db.Close()
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: []byte{0x03}, UpperBound: []byte{0x04}})
	if err != nil {
		t.Fatalf("kindtest: %v", err)
	}
	var out []string
	for ok := it.First(); ok; ok = it.Next() {
		out = append(out, fmt.Sprintf("%q=%x", it.Key(), it.Value()))
	}
	if err := it.Close(); err != nil {
		t.Fatalf("kindtest: %v", err)
	}
	return out
}

// quiet drops Pebble's messages.
type quiet struct{}

func (quiet) Infof(string, ...any)           {}
func (quiet) Errorf(string, ...any)          {}
func (quiet) Fatalf(format string, a ...any) { panic(fmt.Sprintf(format, a...)) }

// checkCrash kills the pipeline at seeded points on a crash-simulating
// filesystem and resumes it.
func checkCrash(t tb, c *Config) {
	t.Helper()
	for mi, mode := range modes {
		evs, seed := arrivals(c, chkCrash, mi)
		n := len(evs)
		commitEvery := max(n/10, 1)
		o := options(c, mode, mi == 0)
		o.CommitEvery = -1
		o.Dir = "db"

		// The uninterrupted run commits once, at the end: state must not
		// depend on when commits happen either.
		want := newRowLog()
		refFS := vfs.NewMem()
		o.FS = refFS
		p := open(t, spec(c, want.add, nil), o)
		if err := p.Replay(context.Background(), source(evs, 0)); err != nil {
			t.Fatalf("crash, %v mode, stream seed %d: uninterrupted replay: %v", mode, seed, err)
		}
		wantStats := p.Stats()
		if err := p.Close(); err != nil {
			t.Fatalf("crash: close: %v", err)
		}
		wantRecords := dumpRecords(t, refFS)

		r := rand.New(rand.NewPCG(seed, 3))
		fs := vfs.NewCrashableMem()
		all := map[uint64]string{}
		var resumed []uint64
		for restart := 0; ; restart++ {
			where := fmt.Sprintf("crash, %v mode, stream seed %d, run %d", mode, seed, restart)
			rows := newRowLog()
			o.FS = fs
			p := open(t, spec(c, rows.add, nil), o)
			start := p.ResumeSeq()
			if restart > 0 {
				resumed = append(resumed, start)
			}
			stop := uint64(n)
			if restart < c.Crashes {
				// Spread the crashes over the rest of the stream.
				stop = start + uint64(r.IntN(2*(n-int(start))/(c.Crashes-restart+1)+1))
			}
			for i := start; i < stop; i++ {
				if err := p.Process(evs[i]); err != nil {
					p.Close()
					t.Fatalf("%s: event %d: %v", where, i, err)
				}
				if (i+1)%uint64(commitEvery) == 0 {
					if err := p.Commit(nil); err != nil {
						t.Fatalf("%s: commit: %v", where, err)
					}
				}
			}
			if stop == uint64(n) {
				err := errors.Join(p.Flush(), p.Commit(nil))
				got := p.Stats()
				err = errors.Join(err, p.Close())
				if err != nil {
					t.Fatalf("%s: finish: %v", where, err)
				}
				if msg := mergeRows(all, rows.rows); msg != "" {
					t.Fatalf("%s: %s", where, msg)
				}
				if got.Applied != wantStats.Applied || got.Events != wantStats.Events {
					t.Fatalf("%s: applied %d, events %d; uninterrupted: applied %d, events %d", where, got.Applied, got.Events, wantStats.Applied, wantStats.Events)
				}
				if gotRecords := dumpRecords(t, fs); !slices.Equal(wantRecords, gotRecords) {
					t.Fatalf("%s: stored records differ from the uninterrupted run's: %s", where, firstSliceDiff(wantRecords, gotRecords))
				}
				break
			}
			clone := fs.CrashClone(vfs.CrashCloneCfg{UnsyncedDataPercent: r.IntN(100), RNG: rand.New(rand.NewPCG(seed, uint64(restart)))})
			if msg := mergeRows(all, rows.rows); msg != "" {
				t.Fatalf("%s: %s", where, msg)
			}
			// What the crashed process writes from here on goes to the
			// filesystem it leaves behind; the next run opens the clone.
			p.Close()
			fs = clone
		}
		t.Logf("crash, %v mode: %d events, commits every %d, resumed at %v after simulated crashes", mode, n, commitEvery, resumed)
		if !maps.Equal(want.rows, all) {
			t.Fatalf("crash, %v mode, stream seed %d: rows differ from the uninterrupted run's %s", mode, seed,
				firstDiff(want.rows, all, func() []uint64 { return seqs(n) }))
		}
	}
}

// mergeRows adds rows to all and describes the first re-emitted row that
// differs from its first emission.
func mergeRows(all, rows map[uint64]string) string {
	for _, seq := range slices.Sorted(maps.Keys(rows)) {
		r := rows[seq]
		if prev, ok := all[seq]; ok && prev != r {
			return fmt.Sprintf("row %d re-emitted differently after a restart:\n  first %q\n  again %q", seq, prev, r)
		}
		all[seq] = r
	}
	return ""
}

func firstSliceDiff(want, got []string) string {
	for i := range min(len(want), len(got)) {
		if want[i] != got[i] {
			return fmt.Sprintf("record %d:\n  want %s\n  got  %s", i, want[i], got[i])
		}
	}
	return fmt.Sprintf("want %d records, got %d", len(want), len(got))
}

// checkEncoding drives aggregates directly with each key's events and
// checks the encoding of every state they pass through.
func checkEncoding(t tb, c *Config) {
	t.Helper()
	horizon := c.MaxDisorder + 1 // as the pipeline computes it
	for i := range c.Streams {
		evs, seed := arrivals(c, chkEncoding, i)
		r := rand.New(rand.NewPCG(seed, 11))
		where := fmt.Sprintf("encoding, stream seed %d", seed)
		checkState(t, c, where+", empty aggregate", c.Kind.NewAggregate(horizon), base, r)
		aggs := map[string]tallyward.Aggregate{}
		for _, e := range evs {
			a := aggs[e.Key]
			if a == nil {
				a = c.Kind.NewAggregate(horizon)
				aggs[e.Key] = a
			}
			var h uint64
			if e.Item != "" {
				h = sketch.HashString(e.Item)
			}
			if !a.Add(e.Time, e.Value, h) {
				t.Fatalf("%s: Add refused event %s, within MaxDisorder of the key's newest", where, fmtEvent(e.Event))
			}
			checkState(t, c, fmt.Sprintf("%s, after event %s", where, fmtEvent(e.Event)), a, e.Time, r)
		}
	}
}

// checkState checks one aggregate state's encoding. asked is a time the
// probes are taken around.
func checkState(t tb, c *Config, where string, a tallyward.Aggregate, asked int64, r *rand.Rand) {
	t.Helper()
	defer func() {
		if p := recover(); p != nil {
			t.Fatalf("%s: panic: %v", where, p)
		}
	}()
	b, err := a.AppendBinary(nil)
	if err != nil {
		t.Fatalf("%s: AppendBinary: %v", where, err)
	}
	if len(b) == 0 {
		t.Fatalf("%s: empty encoding (the first byte must be a version)", where)
	}
	if b2, err := a.AppendBinary([]byte("prefix")); err != nil || string(b2) != "prefix"+string(b) {
		t.Fatalf("%s: AppendBinary to a non-empty buffer does not append the same bytes (err %v)", where, err)
	}
	if a.SizeBytes() <= 0 {
		t.Fatalf("%s: SizeBytes %d, want > 0", where, a.SizeBytes())
	}
	horizon := c.MaxDisorder + 1
	d := c.Kind.NewAggregate(horizon)
	if err := d.UnmarshalBinary(b); err != nil {
		t.Fatalf("%s: decoding its own encoding: %v\n  %x", where, err, b)
	}
	if b2, _ := d.AppendBinary(nil); string(b2) != string(b) {
		t.Fatalf("%s: decoded state re-encodes differently:\n  was   %x\n  again %x", where, b, b2)
	}
	at, aok := a.Newest()
	dt, dok := d.Newest()
	if at != dt || aok != dok {
		t.Fatalf("%s: Newest (%d, %v) after decoding, (%d, %v) before", where, dt, dok, at, aok)
	}
	newest := asked
	if aok {
		newest = at
	}
	probes := []int64{asked, asked - 1, newest, newest - 1, newest - int64(horizon) + 1, newest - int64(horizon)/2, newest + int64(c.Spacing)}
	items := []uint64{0, sketch.HashString(c.Item(r))}
	for _, q := range probes {
		for _, it := range items {
			x, y := a.At(q, it), d.At(q, it)
			if math.Float64bits(x) != math.Float64bits(y) && !(math.IsNaN(x) && math.IsNaN(y)) {
				t.Fatalf("%s: as of %d the decoded state answers %v, the original %v", where, q, y, x)
			}
		}
	}
	// Truncations and trailing bytes must be refused, leaving the
	// receiver as it was.
	refuse := func(what string, bad []byte) {
		if err := d.UnmarshalBinary(bad); err == nil {
			t.Fatalf("%s: decoder accepted %s:\n  %x", where, what, bad)
		}
		if b2, _ := d.AppendBinary(nil); string(b2) != string(b) {
			t.Fatalf("%s: a refused decode (%s) changed the receiver", where, what)
		}
	}
	for _, cut := range cuts(len(b), r) {
		refuse(fmt.Sprintf("a truncation to %d of %d bytes", cut, len(b)), b[:cut:cut])
	}
	// A version this build cannot know: 255 (254 for a kind whose
	// version is 255).
	unknown := slices.Clone(b)
	unknown[0] = 255 - b[0]/255
	refuse("an unknown version byte", unknown)
	refuse("a trailing zero byte", append(slices.Clip(b), 0))
	refuse("a trailing 0xff byte", append(slices.Clip(b), 0xff))
}

// cuts returns truncation lengths to try: all of them for short
// encodings, otherwise the first and last few and a seeded sample.
func cuts(n int, r *rand.Rand) []int {
	if n <= 40 {
		return ids(n)
	}
	var out []int
	for i := range 12 {
		out = append(out, i, n-1-i)
	}
	for range 16 {
		out = append(out, 12+r.IntN(n-24))
	}
	return out
}
