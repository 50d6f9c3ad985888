// Package join builds three joins on a tallyward pipeline: label joins
// that turn replayed history into training tables, interval joins of two
// kinds of events on a key, and as-of joins that attach the latest value
// of one side to each event of the other.
//
// # How a join is fed
//
// A join consumes its pipeline's rows (Spec.Emit) and watermark
// (Spec.OnWatermark), so it sees events in the pipeline's own order, with
// the pipeline's features, and is driven the same way by Replay, Feed and
// Live. OpenLabels, OpenInterval and OpenAsOf open a pipeline with one
// join wired in; to put several joins on one pipeline, make them with
// NewLabels, NewInterval and NewAsOf, call their Emit and OnWatermark from
// the Spec's, open the pipeline and Attach each before the first event.
//
// Two streams of different Go types feed one pipeline as Either[A, B]:
// Both builds each Spec function from one function per side, IsA and IsB
// select the sides, and Merge interleaves two sources by time. No union
// type is written by hand.
//
// # Guarantees
//
//   - Point in time. A training row carries the Settled features of its
//     event at the event's time (the pipeline's as-of rule: nothing newer
//     counts) and, per label kind, the latest outcome in (time, time + M].
//     Events that have not matured are held, never written as negatives;
//     outcomes for unknown, already matured or earlier events are counted
//     (LabelStats.Unmatched) and handed to OnUnmatched.
//   - Order-free. With a Settled pipeline, the output of each join (its
//     content and its Seq numbering) depends only on the events, not on
//     their arrival order within MaxDisorder; ties at one time are settled
//     by stated rules (greatest value, then encoding), never by arrival.
//     The Eager variants trade that for latency.
//   - Durable. A join's state (held events, kept values, counters and the
//     next output Seq) lives in the pipeline's store under the join's name
//     (a part under key tag 0x06; each layout is documented beside its
//     version constant in labels.go, interval.go and asof.go), is
//     written by every commit of the pipeline, in the same atomic batch as
//     the records and the source position, and expires by the watermark.
//     After a crash the join resumes from the last commit: outputs from it
//     on are emitted again with the same Seq and content (at-least-once;
//     keep the highest Seq made durable to make it exactly-once). Training
//     rows are flushed to their sink before each commit; TrimJSONLines
//     cuts a JSON lines file back to the committed rows on restart, so the
//     file holds each row exactly once.
//   - Erasure. Interval.Forget and AsOf.Forget drop what a join holds for
//     a key; call them before Pipeline.Erase, whose commit then removes
//     both. The joins keep no tombstone of their own.
//   - Bounded. A label join holds the events of the last M (plus the
//     disorder); an interval join the events of the last Hi − Lo; an as-of
//     join one value per key plus the disorder window (TTL bounds the keys).
//
// # Costs
//
// A held training event costs about 150 bytes of memory with two features
// and two labels (96 plus its id, 8 per feature, 16 per label), and about
// 65 bytes stored. Per event, a label join costs a map lookup or two, a
// copy of the row and an ordered insert; each commit writes the held
// events changed since the last one. Measured against the bare pipeline in
// the same run (go test ./join/ -bench Join, a quiet 2-core machine), a
// label join took a Settled replay from about 0.9 to 1.8 µs of process CPU
// per event (GC included; 1.4M to 0.67M events per second), all three
// joins to 2.6 µs (0.45M per second). Committing 18k held events took
// about 60 ms.
//
// # What it is not for
//
// Joins across pipelines or processes, or over keys that the pipeline does
// not see; unbounded interval windows (state grows with Hi − Lo). Labels
// are what the outcome events say, no more: a missing chargeback within M
// is a negative only as far as M covers the outcome's usual delay.
//
// # Concurrency
//
// As the pipeline: a join is driven from the pipeline's goroutine (Live
// serialises goroutines onto it); Stats may be read between calls.
//
// # Example: training rows
//
//	p, labels, err := join.OpenLabels(spec, tallyward.Options{Mode: tallyward.Settled, MaxDisorder: time.Minute},
//		join.LabelSpec[Ev]{
//			Name: "disputes", Maturity: 30 * 24 * time.Hour, Sink: join.NewJSONLines(file),
//			ID:   join.Both[Payment, Dispute](func(p Payment) string { return p.ID }, nil),
//			Ref:  join.Both[Payment](nil, func(d Dispute) string { return d.Payment }),
//			Labels: []join.Label[Ev]{{Name: "disputed", Match: join.IsB[Payment, Dispute]}},
//		})
//	if err != nil {
//		return err
//	}
//	src := join.Merge(payments, func(p Payment) int64 { return p.At }, disputes, func(d Dispute) int64 { return d.At })
//	if err := p.Replay(ctx, src); err != nil {
//		return err
//	}
//	fmt.Println(labels.Stats().Held, "payments not yet matured")
//	return p.Close()
//
// # Example: interval join
//
//	p, _, err := join.OpenInterval(spec, tallyward.Options{Mode: tallyward.Settled},
//		join.IntervalSpec[AccountEvent]{
//			Name: "reset-then-payout", Hi: 30 * time.Minute,
//			Key:   func(e AccountEvent) string { return e.Account },
//			Left:  func(e AccountEvent) bool { return e.Kind == "reset" },
//			Right: func(e AccountEvent) bool { return e.Kind == "payout" },
//			Emit: func(m join.Match[AccountEvent]) {
//				if len(m.Rights) > 0 {
//					review(m.Key, m.Left.Event, m.Rights)
//				}
//			},
//		})
//	// Eager: true emits each pair at once instead.
//
// # Example: as-of join
//
//	p, _, err := join.OpenAsOf(spec, tallyward.Options{Mode: tallyward.Settled},
//		join.AsOfSpec[AccountEvent]{
//			Name: "verification", Key: func(e AccountEvent) string { return e.Account },
//			Left:  func(e AccountEvent) bool { return e.Kind == "pay" },
//			Right: func(e AccountEvent) bool { return e.Kind == "verify" },
//			Value: func(e AccountEvent) float64 { return e.Level },
//			Emit: func(a join.Attached[AccountEvent]) {
//				score(a.Left.Event, a.Values, a.Value) // a.Found: a level was set by then
//			},
//		})
//
// Runnable versions of the three are in example_test.go; worked cases,
// each explained, are in testdata/ (one scenario file per join).
package join
