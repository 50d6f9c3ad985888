package source_test

import (
	"context"
	"math"
	"slices"
	"strings"
	"testing"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

const handoverSpec = `version: 1
events:
  time: {field: ts, format: unix_ms}
  fields:
    - {name: kind, type: string}
    - {name: account, type: string}
    - {name: amount, type: number, optional: true}
    - {name: ok, type: bool, optional: true}
run: {mode: settled, max_disorder: 1m}
entities:
  - name: account
    key: account
    features:
      - {name: n_1h, kind: sliding_count, window: 1h}
      - {name: pay_sum_1h, kind: sliding_sum, window: 1h, value: amount, when: [{field: kind, equals: pay}]}
      - {name: decayed, kind: decayed, half_life: 30m}
      - {name: kinds_1h, kind: distinct, window: 1h, item: kind}
`

type outRow struct {
	t      int64
	fields []specfile.Value
	vals   []float64
}

func runHandover(t *testing.T, f *specfile.File, src tallyward.Source[specfile.Event]) []outRow {
	t.Helper()
	var rows []outRow
	spec := f.Spec
	spec.Emit = func(r tallyward.Row[specfile.Event]) {
		rows = append(rows, outRow{r.Time, r.Event.Fields, slices.Clone(r.Values)})
	}
	p, err := tallyward.Open(spec, f.Options)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	if err := p.Replay(context.Background(), src); err != nil {
		t.Fatal(err)
	}
	return rows
}

// TestHandoverEqualsOneReplay: history from files up to a switch time T,
// then live events from a channel from T on, through one pipeline, give
// the rows of one replay of all the events, row for row; whatever the
// overlap between the two (history holding events after T, live
// repeating events before T).
func TestHandoverEqualsOneReplay(t *testing.T) {
	f, err := specfile.Parse("s.yaml", []byte(handoverSpec))
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	paths := fiveFiles(t, dir, 400)
	opts := source.Options{MaxDisorder: f.Options.MaxDisorder, MaxBadRows: -1}
	r, err := source.Open(paths, f.Schema, opts, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	all := readAll(t, r, -1)
	r.Close()
	r, _ = source.Open(paths, f.Schema, opts, nil, 0)
	want := runHandover(t, f, r.Events())
	r.Close()
	if len(want) != len(all) {
		t.Fatalf("%d rows for %d events", len(want), len(all))
	}
	for _, cut := range []float64{0.1, 0.5, 0.93} {
		at := all[int(cut*float64(len(all)))].Time
		// Live repeats the last few minutes of history, as a real feed
		// started early would; Handover must drop the repeats.
		var live []specfile.Event
		for _, e := range all {
			if e.Time >= at-5*60e9 {
				live = append(live, e)
			}
		}
		ch := make(chan specfile.Event)
		go func() {
			defer close(ch)
			for _, e := range live {
				ch <- e
			}
		}()
		hist, _ := source.Open(paths, f.Schema, opts, nil, 0)
		got := runHandover(t, f, source.Handover(hist.Events(), source.FromChannel(context.Background(), ch),
			func(e specfile.Event) int64 { return e.Time }, at))
		hist.Close()
		if len(got) != len(want) {
			t.Fatalf("cut %v: %d rows, want %d", cut, len(got), len(want))
		}
		for i := range want {
			g, w := got[i], want[i]
			if g.t != w.t || !slices.Equal(g.fields, w.fields) || !slices.EqualFunc(g.vals, w.vals, func(a, b float64) bool { return math.Float64bits(a) == math.Float64bits(b) }) {
				t.Fatalf("cut %v row %d: %+v, want %+v", cut, i, g, w)
			}
		}
	}
}

// TestJSONLinesStream: a live JSON-lines stream yields its good rows and
// tells bad ones with their line.
func TestJSONLinesStream(t *testing.T) {
	s := schema(t)
	in := `{"ts":1767225600000,"kind":"login","account":"a1"}` + "\n\nnot json\n" + `{"ts":1767225601000,"kind":"pay","account":"a2","amount":3}`
	var bad []*source.RowError
	var got []specfile.Event
	for ev, err := range source.Lines(strings.NewReader(in), "stdin", s, func(e *source.RowError) { bad = append(bad, e) }) {
		if err != nil {
			t.Fatal(err)
		}
		got = append(got, ev)
	}
	if len(got) != 2 || got[1].Fields[2].Num != 3 || len(bad) != 1 || !strings.HasPrefix(bad[0].Error(), "stdin:3:") {
		t.Fatalf("got %+v, bad %v", got, bad)
	}
}
