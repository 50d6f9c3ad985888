package join

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/cockroachdb/datadriven"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward"
)

// act is the scenario event: one action on an account of an invented
// payments service (a payment, a chargeback, a password reset, a payout,
// a verification step).
type act struct {
	T    int64   `json:"t"`
	Kind string  `json:"kind"`
	Acct string  `json:"acct"`
	ID   string  `json:"id,omitempty"`
	Ref  string  `json:"ref,omitempty"`
	V    float64 `json:"v,omitempty"`
}

const sec = int64(time.Second)

// base is the scenario epoch: times in the files are seconds after it.
const base = int64(1_700_000_000) * sec

func actSpec() tallyward.Spec[act] {
	pay := func(e act) bool { return e.Kind == "pay" }
	return tallyward.Spec[act]{
		Time: func(e act) int64 { return e.T },
		Entities: []tallyward.Entity[act]{{Name: "account", Key: func(e act) string { return e.Acct }, Features: []tallyward.Feature[act]{
			{Name: "pays_1m", Kind: tallyward.SlidingCount{Window: time.Minute, Resolution: time.Second}, Where: pay},
			{Name: "amount_1m", Kind: tallyward.SlidingSum{Window: time.Minute, Resolution: time.Second}, Where: pay, Value: func(e act) float64 { return e.V }},
		}}},
	}
}

func actLabels(m time.Duration, sink RowSink) LabelSpec[act] {
	return LabelSpec[act]{
		Name: "training", Maturity: m, Sink: sink,
		ID: func(e act) string {
			if e.Kind == "pay" {
				return e.ID
			}
			return ""
		},
		Ref: func(e act) string { return e.Ref },
		Labels: []Label[act]{
			{Name: "chargeback", Match: func(e act) bool { return e.Kind == "chargeback" }},
			{Name: "fraud", Match: func(e act) bool { return e.Kind == "fraud" }, Value: func(e act) float64 { return e.V }},
		},
	}
}

// scenario drives one pipeline and join from a datadriven file.
type scenario struct {
	t      testing.TB
	fs     vfs.FS
	args   map[string]string
	p      *tallyward.Pipeline[act]
	out    *strings.Builder
	fed    []act
	labels *Labels[act]
	sink   *MemorySink
	iv     *Interval[act]
	asof   *AsOf[act]
}

func (s *scenario) arg(name, def string) string {
	if v, ok := s.args[name]; ok {
		return v
	}
	return def
}

func (s *scenario) dur(name string) time.Duration {
	v, err := strconv.ParseInt(s.arg(name, "0"), 10, 64)
	if err != nil {
		s.t.Fatalf("%s: %v", name, err)
	}
	return time.Duration(v * sec)
}

func rel(t int64) string { return strconv.FormatInt((t-base)/sec, 10) }

func num(v float64) string {
	if math.IsNaN(v) {
		return "NaN"
	}
	return strconv.FormatFloat(v, 'g', -1, 64)
}

func (s *scenario) open() {
	opts := tallyward.Options{Mode: tallyward.Settled, MaxDisorder: s.dur("disorder"), Dir: "db", FS: s.fs, CommitEvery: -1}
	if s.arg("mode", "settled") == "eager" {
		opts.Mode = tallyward.Eager
	}
	spec := actSpec()
	var err error
	switch s.arg("join", "") {
	case "labels":
		if s.sink == nil {
			s.sink = &MemorySink{}
		}
		s.p, s.labels, err = OpenLabels(spec, opts, actLabels(s.dur("maturity"), printSink{s}))
	case "interval":
		s.p, s.iv, err = OpenInterval(spec, opts, IntervalSpec[act]{
			Name: "reset-payout", Key: func(e act) string { return e.Acct },
			Left: func(e act) bool { return e.Kind == "reset" }, Right: func(e act) bool { return e.Kind == "payout" },
			Lo: s.dur("lo"), Hi: s.dur("hi"), Eager: s.arg("eager", "false") == "true",
			Emit: func(m Match[act]) {
				var rs []string
				for _, r := range m.Rights {
					rs = append(rs, r.Event.ID+"@"+rel(r.Time))
				}
				fmt.Fprintf(s.out, "match %d: key=%s left=%s@%s rights=[%s]\n", m.Seq, m.Key, m.Left.Event.ID, rel(m.Left.Time), strings.Join(rs, " "))
			},
		})
	case "asof":
		s.p, s.asof, err = OpenAsOf(spec, opts, AsOfSpec[act]{
			Name: "verification", Key: func(e act) string { return e.Acct },
			Left: func(e act) bool { return e.Kind == "pay" }, Right: func(e act) bool { return e.Kind == "verify" },
			Value: func(e act) float64 { return e.V }, Eager: s.arg("eager", "false") == "true", TTL: s.dur("ttl"),
			Emit: func(a Attached[act]) {
				at := "none"
				if a.Found {
					at = rel(a.At)
				}
				fmt.Fprintf(s.out, "attach %d: key=%s left=%s@%s value=%s at=%s\n", a.Seq, a.Key, a.Left.Event.ID, rel(a.Left.Time), num(a.Value), at)
			},
		})
	default:
		s.t.Fatalf("unknown join %q", s.arg("join", ""))
	}
	if err != nil {
		s.t.Fatal(err)
	}
}

// printSink renders training rows into the scenario output.
type printSink struct{ s *scenario }

func (printSink) Begin(features, labels []string) error { return nil }
func (p printSink) Write(r *TrainingRow) error {
	fmt.Fprintf(p.s.out, "row %d: id=%s t=%s pays_1m=%s amount_1m=%s | chargeback=%s fraud=%s\n", r.Seq, r.ID, rel(r.Time),
		num(r.Features[0]), num(r.Features[1]), num(r.Labels[0]), num(r.Labels[1]))
	return nil
}
func (printSink) Flush() error { return nil }

func parseAct(t testing.TB, line string) act {
	f := strings.Fields(line)
	if len(f) < 2 {
		t.Fatalf("bad event line %q", line)
	}
	secs, err := strconv.ParseInt(f[0], 10, 64)
	if err != nil {
		t.Fatalf("bad time in %q", line)
	}
	e := act{T: base + secs*sec, Kind: f[1]}
	for _, kv := range f[2:] {
		k, v, _ := strings.Cut(kv, "=")
		switch k {
		case "acct":
			e.Acct = v
		case "id":
			e.ID = v
		case "ref":
			e.Ref = v
		case "v":
			e.V, err = strconv.ParseFloat(v, 64)
			if err != nil {
				t.Fatalf("bad value in %q", line)
			}
		default:
			t.Fatalf("unknown field %q in %q", k, line)
		}
	}
	return e
}

func (s *scenario) process(e act) {
	if err := s.p.Process(e); err != nil {
		fmt.Fprintf(s.out, "event %s@%s: %v\n", e.ID, rel(e.T), err)
	}
}

func (s *scenario) run(td *datadriven.TestData) string {
	s.out = &strings.Builder{}
	switch td.Cmd {
	case "open":
		s.fs = vfs.NewMem()
		s.args = map[string]string{}
		for _, a := range td.CmdArgs {
			s.args[a.Key] = strings.Join(a.Vals, ",")
		}
		s.fed = nil
		s.open()
		return "ok"
	case "feed":
		for _, line := range strings.Split(strings.TrimSpace(td.Input), "\n") {
			if line = strings.TrimSpace(line); line == "" || strings.HasPrefix(line, "#") {
				continue
			}
			e := parseAct(s.t, line)
			s.fed = append(s.fed, e)
			s.process(e)
		}
	case "advance":
		secs, err := strconv.ParseInt(td.CmdArgs[0].Key, 10, 64)
		if err != nil {
			s.t.Fatal(err)
		}
		if err := s.p.Advance(base + secs*sec); err != nil {
			s.t.Fatal(err)
		}
	case "flush":
		if err := s.p.Flush(); err != nil {
			s.t.Fatal(err)
		}
	case "restart":
		// Close commits; the reopened pipeline re-reads the source from
		// its resume point, as a real source would.
		if err := s.p.Close(); err != nil {
			s.t.Fatal(err)
		}
		s.open()
		for _, e := range s.fed[s.p.ResumeSeq():] {
			s.process(e)
		}
	case "stats":
		switch {
		case s.labels != nil:
			st := s.labels.Stats()
			fmt.Fprintf(s.out, "held=%d rows=%d attached=%d unmatched=%d duplicates=%d\n", st.Held, st.Rows, st.Attached, st.Unmatched, st.Duplicates)
		case s.iv != nil:
			st := s.iv.Stats()
			fmt.Fprintf(s.out, "held-left=%d held-right=%d matches=%d pairs=%d\n", st.HeldLeft, st.HeldRight, st.Matches, st.Pairs)
		case s.asof != nil:
			st := s.asof.Stats()
			fmt.Fprintf(s.out, "keys=%d points=%d waiting=%d emitted=%d found=%d\n", st.Keys, st.Points, st.Waiting, st.Emitted, st.Found)
		}
	default:
		s.t.Fatalf("unknown command %q", td.Cmd)
	}
	if s.out.Len() == 0 {
		return "(nothing)"
	}
	return s.out.String()
}

// The worked examples: one scenario file per join, each case explained in
// the file. The expected outputs were worked out by hand from the rules in
// the package doc (rewrite with -rewrite only after checking a change by
// hand).
func TestScenarios(t *testing.T) {
	for _, name := range []string{"labels", "interval", "asof"} {
		t.Run(name, func(t *testing.T) { runScenario(t, "testdata/"+name) })
	}
}

func runScenario(t *testing.T, path string) {
	{
		s := &scenario{t: t}
		defer func() {
			if s.p != nil {
				s.p.Close()
			}
		}()
		datadriven.RunTest(t, path, func(t *testing.T, td *datadriven.TestData) string {
			s.t = t
			return s.run(td)
		})
	}
}
