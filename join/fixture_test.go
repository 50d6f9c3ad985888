package join

import (
	"cmp"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
)

const (
	minute = int64(time.Minute)
	hour   = int64(time.Hour)
	day    = 24 * hour
)

// history is a seeded stream of an invented payments service: payments
// (some answered by a chargeback or a fraud review 1 hour to 30 days
// later), password resets, payouts and verification steps.
type history struct {
	evs []act // in time order
	end int64 // newest time
}

// genHistory makes about n events over accounts accounts, one event every
// gap on average. Amounts are whole numbers so sums are exact in any order.
func genHistory(seed uint64, n, accounts int, gap int64) history {
	r := rand.New(rand.NewPCG(seed, seed^0x5bd1e995))
	z := rand.NewZipf(r, 1.2, 1, uint64(accounts-1))
	var evs []act
	t := base
	id := 0
	next := func() string { id++; return fmt.Sprintf("e%d", id) }
	for len(evs) < n {
		t += 1 + r.Int64N(2*gap)
		acct := fmt.Sprintf("a%d", z.Uint64())
		switch k := r.IntN(20); {
		case k < 14:
			p := act{T: t, Kind: "pay", Acct: acct, ID: next(), V: float64(1 + r.IntN(500))}
			evs = append(evs, p)
			lag := func() int64 { return hour + r.Int64N(30*day-hour+1) }
			if r.IntN(6) == 0 {
				evs = append(evs, act{T: t + lag(), Kind: "chargeback", Acct: acct, ID: next(), Ref: p.ID})
			}
			for r.IntN(4) == 0 {
				evs = append(evs, act{T: t + lag(), Kind: "fraud", Acct: acct, ID: next(), Ref: p.ID, V: float64(r.IntN(4)) / 4})
			}
		case k < 16:
			evs = append(evs, act{T: t, Kind: "reset", Acct: acct, ID: next()})
		case k < 19:
			evs = append(evs, act{T: t, Kind: "payout", Acct: acct, ID: next(), V: float64(1 + r.IntN(100))})
		default:
			evs = append(evs, act{T: t, Kind: "verify", Acct: acct, ID: next(), V: float64(1 + r.IntN(3))})
		}
	}
	// Outcomes past the generated span would stretch it; cut them.
	evs = slices.DeleteFunc(evs, func(e act) bool { return e.T > t })
	slices.SortStableFunc(evs, func(a, b act) int { return cmp.Compare(a.T, b.T) })
	return history{evs: evs, end: t}
}

// shuffleWithin reorders evs by arrival key t + U[0, d]: no event arrives
// more than d after a newer one, so none is late under MaxDisorder d.
func shuffleWithin(r *rand.Rand, evs []act, d int64) []act {
	type keyed struct {
		k int64
		e act
	}
	ks := make([]keyed, len(evs))
	for i, e := range evs {
		ks[i] = keyed{e.T + r.Int64N(d+1), e}
	}
	slices.SortStableFunc(ks, func(a, b keyed) int { return cmp.Compare(a.k, b.k) })
	out := make([]act, len(evs))
	for i, k := range ks {
		out[i] = k.e
	}
	return out
}

// richSpec: features over an hour and a day, whole panes of a minute and
// an hour, so a brute-force recount is simple.
func richSpec() tallyward.Spec[act] {
	pay := func(e act) bool { return e.Kind == "pay" }
	return tallyward.Spec[act]{
		Time: func(e act) int64 { return e.T },
		Entities: []tallyward.Entity[act]{{Name: "account", Key: func(e act) string { return e.Acct }, Features: []tallyward.Feature[act]{
			{Name: "pays_1h", Kind: tallyward.SlidingCount{Window: time.Hour, Resolution: time.Minute}, Where: pay},
			{Name: "amount_1d", Kind: tallyward.SlidingSum{Window: 24 * time.Hour, Resolution: time.Hour}, Where: pay, Value: func(e act) float64 { return e.V }},
		}}},
	}
}

// outputs renders every output of the three joins, one line each, keyed
// by join and Seq, so two runs can be compared line by line.
type outputs struct {
	lines map[string]string
	order []string
}

func newOutputs() *outputs { return &outputs{lines: map[string]string{}} }

func (o *outputs) add(t testing.TB, key, line string) {
	if prev, ok := o.lines[key]; ok {
		require.Equal(t, prev, line, "%s emitted twice, differently", key)
		return
	}
	o.lines[key] = line
	o.order = append(o.order, key)
}

func bits(vs []float64) string {
	var b strings.Builder
	for _, v := range vs {
		fmt.Fprintf(&b, " %x", math.Float64bits(v))
	}
	return b.String()
}

func renderRow(r *TrainingRow) (string, string) {
	return fmt.Sprintf("L%d", r.Seq), fmt.Sprintf("%s t=%d f=%s l=%s", r.ID, r.Time, bits(r.Features), bits(r.Labels))
}

func renderMatch(m Match[act]) (string, string) {
	var b strings.Builder
	fmt.Fprintf(&b, "%s@%d f=%s:", m.Left.Event.ID, m.Left.Time, bits(m.Values))
	for _, r := range m.Rights {
		fmt.Fprintf(&b, " %s@%d", r.Event.ID, r.Time)
	}
	return fmt.Sprintf("I%d", m.Seq), b.String()
}

func renderAttached(a Attached[act]) (string, string) {
	return fmt.Sprintf("A%d", a.Seq), fmt.Sprintf("%s@%d f=%s v=%x at=%d found=%v", a.Left.Event.ID, a.Left.Time, bits(a.Values), math.Float64bits(a.Value), a.At, a.Found)
}

// funcSink adapts a function to RowSink.
type funcSink func(r *TrainingRow) error

func (funcSink) Begin(_, _ []string) error    { return nil }
func (f funcSink) Write(r *TrainingRow) error { return f(r) }
func (funcSink) Flush() error                 { return nil }

// joined is one pipeline with all three joins attached.
type joined struct {
	p  *tallyward.Pipeline[act]
	lj *Labels[act]
	iv *Interval[act]
	ao *AsOf[act]
}

const maturity = 14 * 24 * time.Hour

// openJoined opens a pipeline over richSpec with a label join (maturity
// 14 days), a Settled interval join (payouts from 10 minutes before to 30
// minutes after a reset) and an as-of join (verification level at each payment).
func openJoined(t testing.TB, opts tallyward.Options, sink RowSink, onMatch func(Match[act]), onAttach func(Attached[act])) *joined {
	return openJoinedVariant(t, opts, false, sink, onMatch, onAttach)
}

// openJoinedVariant is openJoined with the Eager variants of the interval
// and as-of joins when eager is set.
func openJoinedVariant(t testing.TB, opts tallyward.Options, eager bool, sink RowSink, onMatch func(Match[act]), onAttach func(Attached[act])) *joined {
	t.Helper()
	lj, err := NewLabels(actLabels(maturity, sink))
	require.NoError(t, err)
	iv, err := NewInterval(IntervalSpec[act]{
		Name: "reset-payout", Key: func(e act) string { return e.Acct },
		Left: func(e act) bool { return e.Kind == "reset" }, Right: func(e act) bool { return e.Kind == "payout" },
		Lo: -10 * time.Minute, Hi: 30 * time.Minute, Emit: onMatch, Eager: eager,
	})
	require.NoError(t, err)
	ao, err := NewAsOf(AsOfSpec[act]{
		Name: "verification", Key: func(e act) string { return e.Acct },
		Left: func(e act) bool { return e.Kind == "pay" }, Right: func(e act) bool { return e.Kind == "verify" },
		Value: func(e act) float64 { return e.V }, Emit: onAttach, Eager: eager,
	})
	require.NoError(t, err)
	spec := richSpec()
	spec.Emit = func(r tallyward.Row[act]) { lj.Emit(r); iv.Emit(r); ao.Emit(r) }
	spec.OnWatermark = func(w int64) { lj.OnWatermark(w); iv.OnWatermark(w); ao.OnWatermark(w) }
	p, err := tallyward.Open(spec, opts)
	require.NoError(t, err)
	require.NoError(t, lj.Attach(p))
	require.NoError(t, iv.Attach(p))
	require.NoError(t, ao.Attach(p))
	return &joined{p: p, lj: lj, iv: iv, ao: ao}
}

// collect opens a joined pipeline whose outputs all go to o.
func collect(t testing.TB, opts tallyward.Options, o *outputs) *joined {
	return collectVariant(t, opts, false, o)
}

func collectVariant(t testing.TB, opts tallyward.Options, eager bool, o *outputs) *joined {
	return openJoinedVariant(t, opts, eager,
		funcSink(func(r *TrainingRow) error { k, l := renderRow(r); o.add(t, k, l); return nil }),
		func(m Match[act]) { k, l := renderMatch(m); o.add(t, k, l) },
		func(a Attached[act]) { k, l := renderAttached(a); o.add(t, k, l) })
}

func source(evs []act) tallyward.Source[act] {
	return func(yield func(act, error) bool) {
		for _, e := range evs {
			if !yield(e, nil) {
				return
			}
		}
	}
}
