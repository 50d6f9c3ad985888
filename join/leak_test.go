package join

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward"
)

// No leakage (invariant 9, DESIGN.md), by brute force: over a seeded
// history of at least 200k events (20k with -short) whose outcomes arrive
// 1 hour to 30 days after their payment, every training row's features
// equal a recount from only the payments at or before the row's time (by
// the documented pane rule of package window: a window of n panes of width
// r as of t holds the events with ti <= t and floor(ti/r) > floor(t/r) − n),
// and every label equals the outcome known at time + M. Rows are written
// for exactly the payments that matured by the end of the history.
func TestNoLeakageAgainstBruteForce(t *testing.T) {
	n, gap := 230_000, int64(45*time.Second)
	if testing.Short() {
		n, gap = 20_000, int64(500*time.Second)
	}
	h := genHistory(42, n, n/20, gap)
	if !testing.Short() {
		require.GreaterOrEqual(t, len(h.evs), 200_000)
	}
	disorder := 2 * minute
	arrival := shuffleWithin(rand.New(rand.NewPCG(1, 2)), h.evs, disorder)

	sink := &MemorySink{}
	ls := actLabels(maturity, sink)
	var reported uint64
	ls.OnUnmatched = func(e act) {
		require.NotEmpty(t, e.Ref)
		reported++
	}
	p, lj, err := OpenLabels(richSpec(), tallyward.Options{Mode: tallyward.Settled, MaxDisorder: time.Duration(disorder)}, ls)
	require.NoError(t, err)
	defer p.Close()
	require.NoError(t, p.Replay(context.Background(), source(arrival)))
	require.Equal(t, []string{"account.pays_1h", "account.amount_1d"}, sink.Features)

	// The reference, from the raw history only.
	type payRef struct {
		t      []int64
		prefix []float64 // prefix sums of amounts
	}
	pays := map[string]*payRef{}
	byID := map[string]act{}
	newest := h.evs[len(h.evs)-1].T
	for _, e := range h.evs {
		if e.Kind != "pay" {
			continue
		}
		pr := pays[e.Acct]
		if pr == nil {
			pr = &payRef{prefix: []float64{0}}
			pays[e.Acct] = pr
		}
		pr.t = append(pr.t, e.T)
		pr.prefix = append(pr.prefix, pr.prefix[len(pr.prefix)-1]+e.V)
		byID[e.ID] = e
	}
	m := int64(maturity)
	type labels struct {
		cb, fraud float64
		fraudAt   int64
		hasFraud  bool
	}
	want := map[string]*labels{}
	unmatched := uint64(0)
	for _, e := range h.evs {
		if e.Ref == "" {
			continue
		}
		p := byID[e.Ref]
		if e.T <= p.T || e.T > p.T+m {
			unmatched++
			continue
		}
		l := want[e.Ref]
		if l == nil {
			l = &labels{}
			want[e.Ref] = l
		}
		switch e.Kind {
		case "chargeback":
			l.cb = 1
		case "fraud":
			if !l.hasFraud || e.T > l.fraudAt || (e.T == l.fraudAt && e.V > l.fraud) {
				l.fraud, l.fraudAt, l.hasFraud = e.V, e.T, true
			}
		}
	}
	// window counts events in panes (floor(t/r) - n, floor(t/r)] up to t.
	window := func(pr *payRef, t, r, panes int64) (count int, sum float64) {
		lo := (t/r - panes + 1) * r
		i := sort.Search(len(pr.t), func(i int) bool { return pr.t[i] >= lo })
		j := sort.Search(len(pr.t), func(i int) bool { return pr.t[i] > t })
		return j - i, pr.prefix[j] - pr.prefix[i]
	}

	mismatches := 0
	matured := 0
	for _, e := range byID {
		if e.T+m <= newest {
			matured++
		}
	}
	require.Equal(t, matured, len(sink.Rows), "rows written = payments matured by the end")
	seen := map[string]bool{}
	for i, r := range sink.Rows {
		require.Equal(t, uint64(i), r.Seq)
		if i > 0 {
			prev := sink.Rows[i-1]
			require.True(t, prev.Time < r.Time || (prev.Time == r.Time && prev.ID < r.ID), "rows in (time + M, id) order")
		}
		require.False(t, seen[r.ID], "row for %s written twice", r.ID)
		seen[r.ID] = true
		e, ok := byID[r.ID]
		require.True(t, ok)
		pr := pays[e.Acct]
		cnt, _ := window(pr, e.T, minute, 60)
		_, sum := window(pr, e.T, hour, 24)
		l := want[r.ID]
		if l == nil {
			l = &labels{}
		}
		if r.Time != e.T || r.Features[0] != float64(cnt) || r.Features[1] != sum || r.Labels[0] != l.cb || r.Labels[1] != l.fraud {
			mismatches++
			if mismatches < 5 {
				t.Errorf("row %s: got t=%d %v %v, want t=%d [%d %v] [%v %v]", r.ID, r.Time, r.Features, r.Labels, e.T, cnt, sum, l.cb, l.fraud)
			}
		}
	}
	st := lj.Stats()
	require.Zero(t, mismatches)
	require.Equal(t, unmatched, st.Unmatched, "outcomes after maturity are counted")
	require.Equal(t, unmatched, reported, "and reported")
	require.Equal(t, len(byID)-matured, st.Held, "unmatured payments are held, not written")
	labelled := 0
	for _, r := range sink.Rows {
		if slices.ContainsFunc(r.Labels, func(v float64) bool { return v != 0 && !math.IsNaN(v) }) {
			labelled++
		}
	}
	t.Logf("%d events, %d rows checked (%d with a label), %d held unmatured, %d outcomes unmatched, 0 mismatches",
		len(h.evs), len(sink.Rows), labelled, st.Held, st.Unmatched)
}
