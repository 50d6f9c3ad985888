package source

import (
	"context"

	"github.com/tallyward/tallyward"
)

// Handover joins a finite history to a live source at switch time at:
// every event with time before at comes from history, every event at or
// after it from live. Events of history at or after at are skipped (live
// delivers them) and events of live before at are skipped (history
// delivered them), so nothing is missed or counted twice however the two
// overlap, as long as history holds every event before at and live every
// event from at on.
//
// Feed the result to one pipeline with Pipeline.Feed: history and live
// then run through the same state, watermark and sequence numbers, and
// the rows equal those of one replay of the same events. Events from live
// must arrive within the pipeline's MaxDisorder of each other, as from
// any source; the first live events may be up to MaxDisorder older than
// the last history events.
//
// Skipped events are not yielded, so they take no sequence numbers; a
// resumable position covers the history part only (a Reader's cursor).
func Handover[E any](history, live tallyward.Source[E], timeOf func(E) int64, at int64) tallyward.Source[E] {
	return func(yield func(E, error) bool) {
		for e, err := range history {
			if err != nil {
				yield(e, err)
				return
			}
			if timeOf(e) >= at {
				continue
			}
			if !yield(e, nil) {
				return
			}
		}
		for e, err := range live {
			if err != nil {
				yield(e, err)
				return
			}
			if timeOf(e) < at {
				continue
			}
			if !yield(e, nil) {
				return
			}
		}
	}
}

// FromChannel is a live source reading ch until it is closed or ctx ends
// (then it yields ctx's error).
func FromChannel[E any](ctx context.Context, ch <-chan E) tallyward.Source[E] {
	return func(yield func(E, error) bool) {
		for {
			select {
			case <-ctx.Done():
				var zero E
				yield(zero, ctx.Err())
				return
			case e, ok := <-ch:
				if !ok {
					return
				}
				if !yield(e, nil) {
					return
				}
			}
		}
	}
}
