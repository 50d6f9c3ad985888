package tallyward

import (
	"context"
	"fmt"
	"reflect"
	"runtime"
	"sync"
	"time"

	"github.com/tallyward/tallyward/internal/sat"
)

// Live is the live driver: a thin, goroutine-safe shell around a Pipeline.
// Submissions from many goroutines are serialised onto the one core; the
// injected clock drives only the time checks against it (FutureSkew ahead,
// PastSkew behind) and the idle watermark advance, so with a clock that
// never triggers those, a live run is identical to a replay of the same
// sequence.
type Live[E any] struct {
	mu      sync.Mutex
	turn    *sync.Cond
	p       *Pipeline[E]
	clock   Clock
	next    uint64 // ticket of the next event SubmitInOrder lets through
	lastArr int64  // clock time of the last arrival
	closed  bool   // Close ran: parked SubmitInOrder calls return ErrClosed
}

// NewLive wraps p. The caller must not use p directly while Live is in
// use: every operation of the pipeline that changes it (Erase,
// LiftErasure, Snapshot, ResetNewest, Commit, Flush, Close) has a Live
// counterpart that takes the same lock.
//
// Spec.Emit and Spec.OnLate run on the goroutine that holds the lock. A
// call back into this Live (or into the pipeline) from inside them returns
// ErrReentered instead of deadlocking; reading Stats is the exception and
// is allowed. If rows must cause events, hand them to another goroutine
// and do not wait for it inside the callback. The spec's other functions
// (Time, Key, Where, Value, Item) must not call into the Live at all: the
// call would wait for itself.
func NewLive[E any](p *Pipeline[E], clock Clock) *Live[E] {
	l := &Live[E]{p: p, clock: clock, next: p.seen}
	l.turn = sync.NewCond(&l.mu)
	l.lastArr = clock.Now()
	return l
}

// Submit processes e as the next event of the sequence (arrival order at
// the lock) and returns Process's error.
func (l *Live[E]) Submit(e E) error {
	if err := l.lock(); err != nil {
		return err
	}
	defer l.mu.Unlock()
	_, err := l.submitLocked(e, nil, false)
	return err
}

// Score is Submit that also appends e's features to dst (Eager mode).
func (l *Live[E]) Score(e E, dst []float64) ([]float64, error) {
	if l.p.opts.Mode != Eager {
		return dst, ErrNotEager
	}
	if err := l.lock(); err != nil {
		return dst, err
	}
	defer l.mu.Unlock()
	return l.submitLocked(e, dst, true)
}

// SubmitInOrder processes e as event number n of the sequence: it waits
// until events n0..n-1 have been submitted (n0 = ResumeSeq() when Live was
// made), so several goroutines that decode or fetch a source in parallel
// still feed the core one ordered sequence. Each n must be submitted once.
// A call still waiting when Close runs returns ErrClosed; a call for a
// number already submitted returns an error at once.
func (l *Live[E]) SubmitInOrder(n uint64, e E) error {
	if err := l.lock(); err != nil {
		return err
	}
	defer l.mu.Unlock()
	if n < l.next {
		// Its turn has passed: waiting would never end.
		return fmt.Errorf("tallyward: SubmitInOrder(%d): event %d was already submitted", n, n)
	}
	for l.next != n {
		if l.closed {
			return ErrClosed
		}
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
	if err := l.lock(); err != nil {
		return err
	}
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
	return l.do(func() error { return l.p.Commit(cursor) })
}

// Flush flushes the pipeline; see Pipeline.Flush.
func (l *Live[E]) Flush() error { return l.do(l.p.Flush) }

// Erase erases one entity key; see Pipeline.Erase. Safe to call while
// other goroutines submit events: it runs between two of them.
func (l *Live[E]) Erase(entity, key string) error {
	return l.do(func() error { return l.p.Erase(entity, key) })
}

// LiftErasure lifts an erasure; see Pipeline.LiftErasure.
func (l *Live[E]) LiftErasure(entity, key string) error {
	return l.do(func() error { return l.p.LiftErasure(entity, key) })
}

// Snapshot writes a consistent copy of the state to dir; see
// Pipeline.Snapshot. Submissions wait while it runs.
func (l *Live[E]) Snapshot(dir string) error {
	return l.do(func() error { return l.p.Snapshot(dir) })
}

// ResetNewest sets the newest event time and the watermark; see
// Pipeline.ResetNewest.
func (l *Live[E]) ResetNewest(newest int64) error {
	return l.do(func() error { return l.p.ResetNewest(newest) })
}

// Stats returns the pipeline's stats. Unlike the other methods it may be
// called from inside Spec.Emit.
func (l *Live[E]) Stats() Stats {
	if l.p.emitting.Load() && calledFromEmit() {
		return l.p.Stats() // the caller already holds the lock
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.p.Stats()
}

// Close closes the pipeline (committing) and wakes every SubmitInOrder
// call still waiting for its turn with ErrClosed.
func (l *Live[E]) Close() error {
	return l.do(func() error {
		l.closed = true
		l.turn.Broadcast()
		return l.p.Close()
	})
}

func (l *Live[E]) do(fn func() error) error {
	if err := l.lock(); err != nil {
		return err
	}
	defer l.mu.Unlock()
	return fn()
}

// lock takes l.mu, or returns ErrReentered when the caller is the
// goroutine that holds it, inside Spec.Emit or Spec.OnLate: a plain Lock
// would wait for itself forever. Go has no goroutine identity, so the
// test is whether the caller's own stack runs through the pipeline's
// callback frame; it costs a stack walk only when the lock is contended
// while a callback runs.
func (l *Live[E]) lock() error {
	if l.mu.TryLock() {
		return nil
	}
	if l.p.emitting.Load() && calledFromEmit() {
		return ErrReentered
	}
	l.mu.Lock()
	return nil
}

// runCallbackName is runCallback's symbol name, whatever the module path.
var runCallbackName = runtime.FuncForPC(reflect.ValueOf(runCallback).Pointer()).Name()

// calledFromEmit reports whether the calling goroutine's stack contains
// runCallback, the frame through which the pipeline calls user callbacks.
func calledFromEmit() bool {
	pcs := make([]uintptr, 64)
	for {
		n := runtime.Callers(2, pcs)
		if n < len(pcs) {
			pcs = pcs[:n]
			break
		}
		pcs = make([]uintptr, 2*len(pcs))
	}
	frames := runtime.CallersFrames(pcs)
	for {
		f, more := frames.Next()
		if f.Function == runCallbackName {
			return true
		}
		if !more {
			return false
		}
	}
}
