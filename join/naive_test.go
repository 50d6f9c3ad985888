package join

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/require"
)

// The interval and as-of joins against naive recomputations over the raw
// history (fast vs naive): a Settled run over a shuffled history must
// give, for every reset, exactly the payouts of its account in
// [reset − 10 min, reset + 30 min], in (time, encoding) order, and for
// every payment the greatest verification level at the latest time at or
// before it.
func TestIntervalAndAsOfAgainstNaive(t *testing.T) {
	n := 40_000
	if testing.Short() {
		n = 8_000
	}
	h := genHistory(31, n, 200, spanGap(n, 10))
	disorder := 5 * minute
	var matches []Match[act]
	var attached []Attached[act]
	j := openJoined(t, settled(disorder), funcSink(func(*TrainingRow) error { return nil }),
		func(m Match[act]) { m.Values, m.Rights = nil, slices.Clone(m.Rights); matches = append(matches, m) },
		func(a Attached[act]) { a.Values = nil; attached = append(attached, a) })
	defer j.p.Close()
	require.NoError(t, j.p.Replay(context.Background(), source(shuffleWithin(rand.New(rand.NewPCG(2, 2)), h.evs, disorder))))

	enc := func(e act) []byte { b, _ := json.Marshal(e); return b }
	var resets, pays []act
	payouts, verifies := map[string][]act{}, map[string][]act{}
	for _, e := range h.evs {
		switch e.Kind {
		case "reset":
			resets = append(resets, e)
		case "pay":
			pays = append(pays, e)
		case "payout":
			payouts[e.Acct] = append(payouts[e.Acct], e)
		case "verify":
			verifies[e.Acct] = append(verifies[e.Acct], e)
		}
	}

	// Interval: one match per reset, in (reset + Hi, encoding) order.
	require.Len(t, matches, len(resets))
	slices.SortStableFunc(resets, func(a, b act) int {
		return cmp.Or(cmp.Compare(a.T, b.T), bytes.Compare(enc(a), enc(b)))
	})
	paired := 0
	for i, r := range resets {
		var want []Timed[act]
		for _, o := range payouts[r.Acct] {
			if o.T >= r.T-10*minute && o.T <= r.T+30*minute {
				want = append(want, Timed[act]{o.T, o})
			}
		}
		slices.SortStableFunc(want, func(a, b Timed[act]) int {
			return cmp.Or(cmp.Compare(a.Time, b.Time), bytes.Compare(enc(a.Event), enc(b.Event)))
		})
		m := matches[i]
		require.Equal(t, uint64(i), m.Seq)
		require.Equal(t, r, m.Left.Event, "match %d", i)
		if len(want) == 0 {
			require.Empty(t, m.Rights, "match %d", i)
		} else {
			require.Equal(t, want, m.Rights, "match %d", i)
		}
		paired += len(want)
	}

	// As-of: one output per payment; order by the payments' canonical row
	// order, so compare by payment id.
	require.Len(t, attached, len(pays))
	byID := map[string]Attached[act]{}
	for _, a := range attached {
		byID[a.Left.Event.ID] = a
	}
	found := 0
	for _, p := range pays {
		a, ok := byID[p.ID]
		require.True(t, ok, "payment %s answered", p.ID)
		wantAt, wantV, wantFound := int64(0), math.NaN(), false
		for _, v := range verifies[p.Acct] {
			if v.T <= p.T && (!wantFound || v.T > wantAt || (v.T == wantAt && v.V > wantV)) {
				wantAt, wantV, wantFound = v.T, v.V, true
			}
		}
		require.Equal(t, wantFound, a.Found, "payment %s", p.ID)
		if wantFound {
			found++
			require.Equal(t, wantAt, a.At, "payment %s", p.ID)
			require.Equal(t, wantV, a.Value, "payment %s", p.ID)
		}
	}
	t.Logf("%d resets (%d payouts paired), %d payments (%d with a level), all equal to the naive answers",
		len(resets), paired, len(pays), found)
}
