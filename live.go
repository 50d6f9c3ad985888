package tallyward

import (
	"context"
	"sync"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
)

// Live is the live driver: a thin, goroutine-safe shell around a Pipeline.
// Submissions from many goroutines are serialised onto the one core; the
// injected clock drives only the future-time check and the idle watermark
// advance, so with a clock that never triggers those, a live run is
// identical to a replay of the same sequence.
type Live[E any] struct {
	mu      sync.Mutex
	turn    *sync.Cond
	p       *Pipeline[E]
	clock   Clock
	next    uint64 // ticket of the next event SubmitInOrder lets through
	lastArr int64  // clock time of the last arrival
}

// NewLive wraps p. The caller must not use p directly while Live is in
// use.
func NewLive[E any](p *Pipeline[E], clock Clock) *Live[E] {
	l := &Live[E]{p: p, clock: clock, next: p.seen}
	l.turn = sync.NewCond(&l.mu)
	l.lastArr = clock.Now()
	return l
}

// Submit processes e as the next event of the sequence (arrival order at
// the lock) and returns Process's error.
func (l *Live[E]) Submit(e E) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	_, err := l.submitLocked(e, nil, false)
	return err
}

// Score is Submit that also appends e's features to dst (Eager mode).
func (l *Live[E]) Score(e E, dst []float64) ([]float64, error) {
	if l.p.opts.Mode != Eager {
		return dst, ErrNotEager
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.submitLocked(e, dst, true)
}

// SubmitInOrder processes e as event number n of the sequence: it waits
// until events n0..n-1 have been submitted (n0 = ResumeSeq() when Live was
// made), so several goroutines that decode or fetch a source in parallel
// still feed the core one ordered sequence. Each n must be submitted once.
func (l *Live[E]) SubmitInOrder(n uint64, e E) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	for l.next != n {
		l.turn.Wait()
	}
	_, err := l.submitLocked(e, nil, false)
	return err
}

func (l *Live[E]) submitLocked(e E, dst []float64, want bool) ([]float64, error) {
	now := l.clock.Now()
	l.lastArr = now
	dst, err := l.p.process(e, now, dst, want)
	l.next++
	l.turn.Broadcast()
	return dst, err
}

// Tick lets the watermark advance on a quiet source: if no event arrived
// for Options.IdleAdvance of clock time, the watermark rises to
// clock − MaxDisorder − IdleAdvance. Run calls it periodically; tests call
// it directly with a fake clock.
func (l *Live[E]) Tick() error {
	l.mu.Lock()
	defer l.mu.Unlock()
	idle := int64(l.p.opts.IdleAdvance)
	if idle == 0 {
		return l.p.usable()
	}
	now := l.clock.Now()
	if now-l.lastArr < idle {
		return l.p.usable()
	}
	return l.p.Advance(sat.Sub(now, int64(l.p.opts.MaxDisorder)+idle))
}

// Run consumes ch until it is closed or ctx ends, ticking every tick of
// real time (no ticking if tick is 0). Per-event rejections are counted,
// not returned.
func (l *Live[E]) Run(ctx context.Context, ch <-chan E, tick time.Duration) error {
	var tc <-chan time.Time
	if tick > 0 {
		t := time.NewTicker(tick)
		defer t.Stop()
		tc = t.C
	}
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case e, ok := <-ch:
			if !ok {
				return nil
			}
			if err := l.Submit(e); err != nil && !benign(err) {
				return err
			}
		case <-tc:
			if err := l.Tick(); err != nil {
				return err
			}
		}
	}
}

// Commit commits the pipeline; see Pipeline.Commit.
func (l *Live[E]) Commit(cursor []byte) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.p.Commit(cursor)
}

// Flush flushes the pipeline; see Pipeline.Flush.
func (l *Live[E]) Flush() error {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.p.Flush()
}

// Stats returns the pipeline's stats.
func (l *Live[E]) Stats() Stats {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.p.Stats()
}

// Close closes the pipeline (committing).
func (l *Live[E]) Close() error {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.p.Close()
}
