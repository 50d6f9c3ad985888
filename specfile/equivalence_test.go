package specfile_test

import (
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

// payEvent is the typed event a Go program would use for the schema of
// testdata/all_kinds.yaml.
type payEvent struct {
	TS       int64   `json:"ts"` // Unix ms
	Type     string  `json:"type"`
	Account  string  `json:"account"`
	Card     string  `json:"card,omitempty"`
	Device   string  `json:"device"`
	Merchant string  `json:"merchant,omitempty"`
	Amount   float64 `json:"amount,omitempty"`
	OK       bool    `json:"ok"`
}

// goSpec is testdata/all_kinds.yaml written with the Go API.
func goSpec() (tallyward.Spec[payEvent], tallyward.Options) {
	isType := func(ts ...string) func(payEvent) bool {
		return func(e payEvent) bool { return slices.Contains(ts, e.Type) }
	}
	amount := func(e payEvent) float64 { return e.Amount }
	h := time.Hour
	day := 24 * h
	spec := tallyward.Spec[payEvent]{
		Time: func(e payEvent) int64 { return e.TS * 1e6 },
		Entities: []tallyward.Entity[payEvent]{
			{Name: "account", Key: func(e payEvent) string { return e.Account }, Features: []tallyward.Feature[payEvent]{
				{Name: "failed_logins_1h", Kind: tallyward.SlidingCount{Window: h, Resolution: time.Minute},
					Where: func(e payEvent) bool { return e.Type == "login" && !e.OK }},
				{Name: "spend_24h", Kind: tallyward.SlidingSum{Window: day}, Value: amount, Where: isType("payment", "refund")},
				{Name: "min_amount_24h", Kind: tallyward.SlidingMin{Window: day}, Value: amount, Where: func(e payEvent) bool { return e.Amount > 0 }},
				{Name: "max_amount_24h", Kind: tallyward.SlidingMax{Window: day}, Value: amount,
					Where: func(e payEvent) bool { return e.Amount >= 0.01 && e.Amount <= 100000 }},
				{Name: "mean_amount_7d", Kind: tallyward.SlidingMean{Window: 7 * day, Resolution: h}, Value: amount,
					Where: func(e payEvent) bool { return e.Type != "login" }},
				{Name: "decayed_logins", Kind: tallyward.Decayed{HalfLife: 6 * h}},
				{Name: "decayed_spend_mean", Kind: tallyward.Decayed{HalfLife: 3 * day, Stat: tallyward.DecayedMean}, Value: amount,
					Where: func(e payEvent) bool { return e.Type != "login" }},
				{Name: "decayed_spend_var", Kind: tallyward.Decayed{HalfLife: 3 * day, Stat: tallyward.DecayedVariance}, Value: amount,
					Where: func(e payEvent) bool { return e.Amount < 5000 }},
				{Name: "login_velocity", Kind: tallyward.Velocity{Short: 10 * time.Minute, Long: day, Resolution: time.Minute, Smoothing: 0.5},
					Where: isType("login")},
				{Name: "since_last", Kind: tallyward.Recency{}, BeforeEvent: true},
				{Name: "age", Kind: tallyward.Recency{Stat: tallyward.Age}},
				{Name: "session_events", Kind: tallyward.Recency{Stat: tallyward.SessionEvents, Gap: 20 * time.Minute}},
				{Name: "devices_24h", Kind: tallyward.Distinct{Window: day, Precision: 10}, Item: func(e payEvent) string { return e.Device }},
				{Name: "devices_ever", Kind: tallyward.DistinctEver{Precision: 11}, Item: func(e payEvent) string { return e.Device }},
				{Name: "login_surge", Kind: tallyward.Surge{Window: 10 * time.Minute, HalfLife: day, Resolution: time.Minute, Smoothing: 2}, Where: isType("login")},
			}},
			{Name: "card", Key: func(e payEvent) string { return e.Card }, Features: []tallyward.Feature[payEvent]{
				{Name: "merchant_seen", Kind: tallyward.Frequency{Epsilon: 0.02, Delta: 0.05}, Item: func(e payEvent) string { return e.Merchant }, BeforeEvent: true},
				{Name: "top_merchant_share", Kind: tallyward.TopShare{Capacity: 16}, Item: func(e payEvent) string { return e.Merchant }},
				{Name: "amount_p95", Kind: tallyward.Quantile{Q: 0.95, RelativeAccuracy: 0.02}, Value: amount, Where: isType("payment")},
				{Name: "decayed_sum", Kind: tallyward.Decayed{HalfLife: day, Stat: tallyward.DecayedSum}, Value: amount},
			}},
		},
	}
	opts := tallyward.Options{Mode: tallyward.Settled, MaxDisorder: 2 * time.Minute, FutureSkew: 2 * h,
		TTL: 30 * day, CommitEvery: 5000}
	return spec, opts
}

// randomPayEvents draws a few days of sign-ins and payments, shuffled
// within the allowed disorder.
func randomPayEvents(rng *rand.Rand, n int) []payEvent {
	evs := make([]payEvent, n)
	t := int64(1_767_225_600_000) // 2026-01-01, ms
	for i := range evs {
		t += rng.Int64N(20_000)
		e := payEvent{TS: t - rng.Int64N(90_000), Account: "acct-" + itoa(rng.IntN(60)), Device: "dev-" + itoa(rng.IntN(90)), OK: rng.IntN(3) > 0}
		switch rng.IntN(4) {
		case 0, 1:
			e.Type = "login"
		case 2:
			e.Type = "payment"
		default:
			e.Type = "refund"
		}
		if e.Type != "login" {
			e.Card = "card-" + itoa(rng.IntN(40))
			e.Merchant = "m-" + itoa(int(math.Sqrt(float64(rng.IntN(400)))))
			e.Amount = math.Round(rng.ExpFloat64()*8000) / 100
		}
		evs[i] = e
	}
	return evs
}

func itoa(i int) string {
	return string(rune('a'+i%26)) + string(rune('a'+i/26%26)) + string(rune('0'+i/676))
}

type rowCopy struct {
	seq  uint64
	vals []float64
}

func runRows[E any](t *testing.T, spec tallyward.Spec[E], opts tallyward.Options, evs []E) []rowCopy {
	t.Helper()
	var rows []rowCopy
	spec.Emit = func(r tallyward.Row[E]) { rows = append(rows, rowCopy{r.Seq, slices.Clone(r.Values)}) }
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	for _, e := range evs {
		if err := p.Process(e); err != nil && !isBenign(err) {
			t.Fatal(err)
		}
	}
	if err := p.Flush(); err != nil {
		t.Fatal(err)
	}
	return rows
}

func isBenign(err error) bool {
	var re *tallyward.RejectError
	return errors.As(err, &re) || errors.Is(err, tallyward.ErrLate)
}

// TestSpecFileEqualsGoAPI: the spec file and the same definitions written
// in Go compute bit-identical rows over the same events (the spec file's
// events decoded from JSON lines).
func TestSpecFileEqualsGoAPI(t *testing.T) {
	n := 20_000
	if testing.Short() {
		n = 4_000
	}
	f, err := specfile.Load("testdata/all_kinds.yaml")
	if err != nil {
		t.Fatal(err)
	}
	gspec, gopts := goSpec()
	if !reflect.DeepEqual(f.Options, gopts) {
		t.Fatalf("options differ:\nspec file %+v\nGo        %+v", f.Options, gopts)
	}
	evs := randomPayEvents(rand.New(rand.NewPCG(1, 2)), n)
	dec := f.Schema.NewJSONDecoder()
	var fevs []specfile.Event
	for _, e := range evs {
		line, _ := json.Marshal(e)
		fe, err := dec.Decode(line)
		if err != nil {
			t.Fatalf("%s: %v", line, err)
		}
		fevs = append(fevs, fe)
	}
	// One item key for both runs: item hashes, and so the rows of item
	// kinds, depend on it.
	key := []byte("specfile test ke")
	gopts.ItemKey = key
	fopts := f.Options
	fopts.ItemKey = key
	want := runRows(t, gspec, gopts, evs)
	got := runRows(t, f.Spec, fopts, fevs)
	if len(got) != len(want) || len(got) == 0 {
		t.Fatalf("%d rows from the spec file, %d from Go", len(got), len(want))
	}
	for i := range want {
		if got[i].seq != want[i].seq {
			t.Fatalf("row %d: seq %d vs %d", i, got[i].seq, want[i].seq)
		}
		for j := range want[i].vals {
			if math.Float64bits(got[i].vals[j]) != math.Float64bits(want[i].vals[j]) {
				t.Fatalf("row %d feature %d: spec file %v, Go %v", i, j, got[i].vals[j], want[i].vals[j])
			}
		}
	}
	// The comparison must not be vacuous: every feature takes more than
	// one value somewhere.
	for j := range want[0].vals {
		distinct := map[uint64]bool{}
		for _, r := range want {
			distinct[math.Float64bits(r.vals[j])] = true
		}
		if len(distinct) < 2 {
			t.Errorf("feature %d is constant over the test stream", j)
		}
	}
}
