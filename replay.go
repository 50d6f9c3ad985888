package tallyward

import (
	"context"
	"errors"
	"iter"
)

// Source is a finite or unbounded sequence of events, each with the error
// met while reading it. A non-nil error stops the driver and is returned.
type Source[E any] = iter.Seq2[E, error]

// Skip returns src without its first n events: for sources that can only
// be read from the start, so a restarted pipeline can be fed from ResumeSeq().
func Skip[E any](src Source[E], n uint64) Source[E] {
	return func(yield func(E, error) bool) {
		var i uint64
		for e, err := range src {
			if err == nil && i < n {
				i++
				continue
			}
			if !yield(e, err) {
				return
			}
		}
	}
}

// Feed processes every event of src (which must start at ResumeSeq()) in
// order. Rejected and late events are counted and skipped; a storage error
// or a source error stops it. It neither flushes nor commits at the end, so
// a live source can continue where src ends with no gap and no double
// count.
func (p *Pipeline[E]) Feed(ctx context.Context, src Source[E]) error {
	n := 0
	for e, err := range src {
		if err != nil {
			return err
		}
		if n++; n&1023 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		if err := p.Process(e); err != nil && !benign(err) {
			return err
		}
	}
	if err := p.finishWork(); err != nil {
		return err
	}
	return ctx.Err()
}

// Replay is the replay driver: it feeds a finite src (starting at
// ResumeSeq()), then flushes (the watermark jumps to +infinity and every held
// row is emitted) and commits.
func (p *Pipeline[E]) Replay(ctx context.Context, src Source[E]) error {
	if err := p.Feed(ctx, src); err != nil {
		return err
	}
	if err := p.Flush(); err != nil {
		return err
	}
	return p.Commit(nil)
}

// benign reports errors about one event that leave the pipeline usable.
func benign(err error) bool {
	return errors.Is(err, ErrRejected) || errors.Is(err, ErrLate) || errors.Is(err, ErrFlushed)
}
