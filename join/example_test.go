package join_test

import (
	"fmt"
	"os"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/join"
)

// Payment and Dispute are two streams of an invented shop.
type Payment struct {
	ID, Card string
	At       int64
	Amount   float64
}

type Dispute struct {
	Payment string
	At      int64
}

type Ev = join.Either[Payment, Dispute]

// at is a time of the invented day, m minutes after 09:00 UTC.
func at(m int64) int64 {
	return time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC).UnixNano() + m*int64(time.Minute)
}

func Example_labels() {
	spec := tallyward.Spec[Ev]{
		Time: join.Both(func(p Payment) int64 { return p.At }, func(d Dispute) int64 { return d.At }),
		Entities: []tallyward.Entity[Ev]{{Name: "card", Key: join.Both[Payment, Dispute](func(p Payment) string { return p.Card }, nil),
			Features: []tallyward.Feature[Ev]{{Name: "pays_1h", Kind: tallyward.SlidingCount{Window: time.Hour}}}}},
	}
	sink := join.NewJSONLines(os.Stdout)
	p, _, err := join.OpenLabels(spec, tallyward.Options{Mode: tallyward.Settled}, join.LabelSpec[Ev]{
		Name: "disputes", Maturity: 30 * time.Minute, Sink: sink,
		ID:     join.Both[Payment, Dispute](func(p Payment) string { return p.ID }, nil),
		Ref:    join.Both[Payment](nil, func(d Dispute) string { return d.Payment }),
		Labels: []join.Label[Ev]{{Name: "disputed", Match: join.IsB[Payment, Dispute]}},
	})
	if err != nil {
		panic(err)
	}
	for _, e := range []Ev{
		join.OfA[Payment, Dispute](Payment{ID: "p1", Card: "c1", At: at(1)}),
		join.OfA[Payment, Dispute](Payment{ID: "p2", Card: "c1", At: at(2)}),
		join.OfB[Payment](Dispute{Payment: "p2", At: at(20)}),
		join.OfA[Payment, Dispute](Payment{ID: "p3", Card: "c2", At: at(40)}),
	} {
		p.Process(e)
	}
	p.Close() // commits, which flushes the sink
	// Output:
	// {"seq":0,"id":"p1","time":1772442060000000000,"features":{"card.pays_1h":1},"labels":{"disputed":0}}
	// {"seq":1,"id":"p2","time":1772442120000000000,"features":{"card.pays_1h":2},"labels":{"disputed":1}}
}

// Reset and Payout are two events of one type here: a kind field selects
// the side.
type AccountEvent struct {
	Kind, Account, ID string
	At                int64
}

func ExampleInterval() {
	spec := tallyward.Spec[AccountEvent]{
		Time: func(e AccountEvent) int64 { return e.At },
		Entities: []tallyward.Entity[AccountEvent]{{Name: "account", Key: func(e AccountEvent) string { return e.Account },
			Features: []tallyward.Feature[AccountEvent]{{Name: "events_1d", Kind: tallyward.SlidingCount{Window: 24 * time.Hour}}}}},
	}
	p, _, err := join.OpenInterval(spec, tallyward.Options{Mode: tallyward.Settled}, join.IntervalSpec[AccountEvent]{
		Name: "reset-then-payout", Hi: 30 * time.Minute,
		Key:   func(e AccountEvent) string { return e.Account },
		Left:  func(e AccountEvent) bool { return e.Kind == "reset" },
		Right: func(e AccountEvent) bool { return e.Kind == "payout" },
		Emit: func(m join.Match[AccountEvent]) {
			fmt.Printf("%s: reset %s, payouts within 30m: %d\n", m.Key, m.Left.Event.ID, len(m.Rights))
		},
	})
	if err != nil {
		panic(err)
	}
	for _, e := range []AccountEvent{
		{"reset", "acct-1", "r1", at(1)}, {"payout", "acct-1", "o1", at(12)},
		{"reset", "acct-2", "r2", at(15)}, {"payout", "acct-2", "o2", at(60)},
	} {
		p.Process(e)
	}
	p.Flush()
	p.Close()
	// Output:
	// acct-1: reset r1, payouts within 30m: 1
	// acct-2: reset r2, payouts within 30m: 0
}

func ExampleAsOf() {
	spec := tallyward.Spec[AccountEvent]{
		Time: func(e AccountEvent) int64 { return e.At },
		Entities: []tallyward.Entity[AccountEvent]{{Name: "account", Key: func(e AccountEvent) string { return e.Account },
			Features: []tallyward.Feature[AccountEvent]{{Name: "events_1d", Kind: tallyward.SlidingCount{Window: 24 * time.Hour}}}}},
	}
	level := map[string]float64{"verify-email": 1, "verify-id": 2}
	p, _, err := join.OpenAsOf(spec, tallyward.Options{Mode: tallyward.Settled}, join.AsOfSpec[AccountEvent]{
		Name: "verification", Key: func(e AccountEvent) string { return e.Account },
		Left:  func(e AccountEvent) bool { return e.Kind == "pay" },
		Right: func(e AccountEvent) bool { return level[e.Kind] > 0 },
		Value: func(e AccountEvent) float64 { return level[e.Kind] },
		Emit: func(a join.Attached[AccountEvent]) {
			fmt.Printf("payment %s: verification level %v\n", a.Left.Event.ID, a.Value)
		},
	})
	if err != nil {
		panic(err)
	}
	for _, e := range []AccountEvent{
		{"pay", "acct-1", "p1", at(1)}, {"verify-email", "acct-1", "v1", at(2)},
		{"pay", "acct-1", "p2", at(3)}, {"verify-id", "acct-1", "v2", at(4)}, {"pay", "acct-1", "p3", at(5)},
	} {
		p.Process(e)
	}
	p.Flush()
	p.Close()
	// Output:
	// payment p1: verification level NaN
	// payment p2: verification level 1
	// payment p3: verification level 2
}
