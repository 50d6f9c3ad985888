package source

import "github.com/tallyward/tallyward"

// Ahead reads src on a goroutine of its own, a few thousand events ahead
// of the consumer, so that decoding input overlaps the pipeline's work
// when a core is free for it. The events, errors and their order are
// src's; only where src runs changes.
//
// src must allow that: a Reader's Events does, and the Reader's CursorAt,
// Progress and BadRows may be called meanwhile (a commit hook's CursorAt
// names an event the pipeline has processed, which the reader has
// passed); Options.OnBadRow then runs on Ahead's goroutine. When the
// consumer stops early, Ahead stops reading and returns only once its
// goroutine has ended, so src is not read after it returns.
func Ahead[E any](src tallyward.Source[E]) tallyward.Source[E] {
	return func(yield func(E, error) bool) {
		type item struct {
			e   E
			err error
		}
		// Events travel in batches: a channel operation per event would
		// cost about as much as decoding it. Batches are recycled.
		const batch, depth = 256, 8
		full := make(chan []item, depth)
		free := make(chan []item, depth+2)
		stop := make(chan struct{})
		go func() {
			defer close(full)
			buf := make([]item, 0, batch)
			send := func() bool {
				select {
				case full <- buf:
				case <-stop:
					return false
				}
				select {
				case buf = <-free:
					buf = buf[:0]
				default:
					buf = make([]item, 0, batch)
				}
				return true
			}
			for e, err := range src {
				buf = append(buf, item{e, err})
				if (len(buf) == batch || err != nil) && !send() {
					return
				}
			}
			if len(buf) > 0 {
				send()
			}
		}()
		defer func() {
			close(stop)
			for range full { // wait for the goroutine to end
			}
		}()
		for b := range full {
			for i := range b {
				if !yield(b[i].e, b[i].err) {
					return
				}
			}
			clear(b)
			select {
			case free <- b:
			default:
			}
		}
	}
}
