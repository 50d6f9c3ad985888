package tallyward

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"math/bits"
	"reflect"
	"runtime"
	"slices"
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
//
// # The clock contract
//
// The Clock must tell Unix nanoseconds on the same scale as event times,
// and must not run behind them by more than Options.FutureSkew: an event
// whose time is more than FutureSkew ahead of the clock is rejected
// (FutureTime), and one more than Options.PastSkew behind it is rejected
// too (PastTime). A clock set to the wrong epoch or unit therefore rejects
// every event. The submitting calls return that rejection; Run, which has
// no caller to return it to, counts it (Stats.Rejected) and logs it to
// Options.Logger.
//
// # Contexts
//
// Calls that can wait take a context: for the core while another
// goroutine holds it (a commit, which syncs to disk, can take tens of
// milliseconds), or, in SubmitInOrder, for earlier events. A call whose
// context ends before it got the core returns the context's error and
// changes nothing; once it has the core it runs to completion.
type Live[E any] struct {
	// sem is the lock on the core: a channel, so that waiting for it can
	// be abandoned when a context ends.
	sem     chan struct{}
	p       *Pipeline[E]
	clock   Clock
	log     *slog.Logger
	next    uint64        // ticket of the next event SubmitInOrder lets through
	moved   chan struct{} // closed and replaced when next moves while waiters > 0
	waiters int
	lastArr int64 // clock time of the last arrival
	runRej  uint64
	closed  bool // Close ran: waiting SubmitInOrder calls return ErrClosed

	// Score calls waiting for the core, with more than one worker: the
	// goroutine that gets the core runs all of them as one batch.
	qmu    sync.Mutex
	queued []*scoreCall[E]
}

// scoreCall is one Score call waiting in Live.queued.
type scoreCall[E any] struct {
	e    E
	now  int64
	dst  []float64
	err  error
	done chan struct{}
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
	l := &Live[E]{sem: make(chan struct{}, 1), p: p, clock: clock, log: p.opts.Logger, next: p.seen, moved: make(chan struct{})}
	l.lastArr = clock.Now()
	return l
}

// lock takes the core, or returns ErrReentered when the caller is the
// goroutine that holds it, inside Spec.Emit or Spec.OnLate: waiting would
// wait for itself forever. Go has no goroutine identity, so the test is
// whether the caller's own stack runs through the pipeline's callback
// frame; it costs a stack walk only when the core is busy while a
// callback runs.
func (l *Live[E]) lock(ctx context.Context) error {
	select {
	case l.sem <- struct{}{}:
		return nil
	default:
	}
	if l.p.emitting.Load() && calledFromEmit() {
		return ErrReentered
	}
	select {
	case l.sem <- struct{}{}:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

func (l *Live[E]) unlock() { <-l.sem }

// Submit processes e as the next event of the sequence (arrival order at
// the core) and returns Process's error.
func (l *Live[E]) Submit(ctx context.Context, e E) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	_, err := l.submitLocked(e, l.clock.Now(), nil, false)
	return err
}

// Score is Submit that also appends e's features to dst (Eager mode).
func (l *Live[E]) Score(ctx context.Context, e E, dst []float64) ([]float64, error) {
	if l.p.opts.Mode != Eager {
		return dst, ErrNotEager
	}
	if l.p.work != nil {
		return l.scoreGrouped(ctx, e, dst)
	}
	if err := l.lock(ctx); err != nil {
		return dst, err
	}
	defer l.unlock()
	return l.submitLocked(e, l.clock.Now(), dst, true)
}

// scoreGrouped is Score with more than one worker. Calls that arrive
// while the core is busy queue up; whichever gets the core next runs
// every queued call, in arrival order, as consecutive events, then hands
// each call its row. Many queued calls (groupForWorkers) go to the
// workers as one batch, so that they keep every worker busy; a few run on
// the goroutine holding the core, one after the other.
func (l *Live[E]) scoreGrouped(ctx context.Context, e E, dst []float64) ([]float64, error) {
	if l.p.emitting.Load() && calledFromEmit() {
		return dst, ErrReentered
	}
	// Alone (the core free, no call waiting), the call runs here as with
	// one worker: queueing it and handing its one event to the workers
	// only adds a channel, an allocation and two goroutine switches (one
	// caller scored at 0.6x of its one-worker rate that way).
	select {
	case l.sem <- struct{}{}:
		l.qmu.Lock()
		alone := len(l.queued) == 0
		l.qmu.Unlock()
		if alone {
			defer l.unlock()
			if l.closed {
				return dst, ErrClosed
			}
			return l.submitLocked(e, l.clock.Now(), dst, true)
		}
		<-l.sem // others wait: join them below, in arrival order
	default:
	}
	c := &scoreCall[E]{e: e, now: l.clock.Now(), dst: dst, done: make(chan struct{})}
	l.qmu.Lock()
	l.queued = append(l.queued, c)
	l.qmu.Unlock()
	for {
		select {
		case <-c.done:
			return c.dst, c.err
		case l.sem <- struct{}{}:
			l.runQueued()
			l.unlock()
		case <-ctx.Done():
			l.qmu.Lock()
			if i := slices.Index(l.queued, c); i >= 0 {
				l.queued = slices.Delete(l.queued, i, i+1)
				l.qmu.Unlock()
				return dst, ctx.Err()
			}
			l.qmu.Unlock()
			<-c.done // taken by the goroutine holding the core: it finishes
			return c.dst, c.err
		}
	}
}

// groupForWorkers is how many queued Score calls it takes to hand them to
// the workers as one batch; fewer run one after the other on the
// goroutine holding the core, as a lone call does. On two cores a batch
// of a few calls lost to running them in turn (BenchmarkLive, 2 workers:
// 4 goroutines 241k events/s handing every group of 4 or more to the
// workers against 246k never handing any; 16 goroutines 181k against
// 213k): the hand-over wakes both workers, which share the cores with
// the commit's goroutine, for a few microseconds of work each.
var groupForWorkers = 16

// runQueued runs every queued Score call; the caller holds the core.
func (l *Live[E]) runQueued() {
	l.qmu.Lock()
	calls := l.queued
	l.queued = nil
	l.qmu.Unlock()
	direct := len(calls) < groupForWorkers
	for _, c := range calls {
		if l.closed {
			c.err = ErrClosed
			continue
		}
		if direct {
			c.dst, c.err = l.submitLocked(c.e, c.now, c.dst, true)
			continue
		}
		l.p.sink = &c.dst
		_, c.err = l.submitLocked(c.e, c.now, nil, true)
		l.p.sink = nil
	}
	err := l.p.finishWork()
	for _, c := range calls {
		if c.err == nil {
			c.err = err
		}
		close(c.done)
	}
}

// SubmitBatch processes es in order as consecutive events of the
// sequence, all or none: it first checks every event against the
// pipeline's state as it would be when that event's turn came, and if one
// would be rejected, or refused as late (unless Options.Lateness is
// ApplyLate), it returns a *BatchError naming it and consumes nothing, so
// no event of a refused batch reaches state or the counters. Otherwise it
// holds the core for the whole batch, so no other submission interleaves,
// and, if want, appends each event's features to dst (Eager mode). first
// is the sequence number the batch's first event got.
//
// Any other error is a storage failure or ctx's. The automatic commit
// (Options.CommitEvery) waits for the end of the batch, so no commit
// splits one; a storage failure can stop a batch part way, but the
// pipeline is then unusable and a restart resumes from the last commit.
func (l *Live[E]) SubmitBatch(ctx context.Context, es []E, dst []float64, want bool) (first uint64, _ []float64, _ error) {
	if want && l.p.opts.Mode != Eager {
		return 0, dst, ErrNotEager
	}
	if err := l.lock(ctx); err != nil {
		return 0, dst, err
	}
	defer l.unlock()
	now := l.clock.Now()
	first = l.p.seen
	if err := l.p.precheck(es, now); err != nil {
		return first, dst, err
	}
	l.p.inBatch = true
	if want && l.p.work != nil {
		// With workers, the batch's rows are appended to dst in order
		// as they are delivered, and the batch runs on every worker.
		l.p.sink = &dst
	}
	for _, e := range es {
		var err error
		if l.p.sink != nil {
			_, err = l.submitLocked(e, now, nil, want) // rows go to the sink, dst
		} else {
			dst, err = l.submitLocked(e, now, dst, want)
		}
		if err != nil {
			l.p.inBatch, l.p.sink = false, nil
			return first, dst, err
		}
	}
	l.p.inBatch = false
	if l.p.sink != nil {
		err := l.p.finishWork()
		l.p.sink = nil
		if err != nil {
			return first, dst, err
		}
	}
	return first, dst, l.p.autoCommit()
}

// SubmitInOrder processes e as event number n of the sequence: it waits
// until events n0..n-1 have been submitted (n0 = ResumeSeq() when Live was
// made), so several goroutines that decode or fetch a source in parallel
// still feed the core one ordered sequence. Each n must be submitted once.
// If ctx ends while it waits, it returns ctx's error and e is not
// submitted; the events after n then wait for n until it is. A call still
// waiting when Close runs returns ErrClosed; a call for a number already
// submitted returns an error at once.
func (l *Live[E]) SubmitInOrder(ctx context.Context, n uint64, e E) error {
	for {
		if err := l.lock(ctx); err != nil {
			return err
		}
		if l.closed {
			l.unlock()
			return ErrClosed
		}
		if n < l.next {
			// Its turn has passed: waiting would never end.
			l.unlock()
			return fmt.Errorf("tallyward: SubmitInOrder(%d): event %d was already submitted", n, n)
		}
		if l.next == n {
			break
		}
		l.waiters++
		moved := l.moved
		l.unlock()
		select {
		case <-moved:
		case <-ctx.Done():
		}
		// Deregister under the lock whatever woke us; a lock that the
		// context forbids is taken anyway, for a moment, to keep count.
		l.sem <- struct{}{}
		l.waiters--
		l.unlock()
		if err := ctx.Err(); err != nil {
			return err
		}
	}
	defer l.unlock()
	_, err := l.submitLocked(e, l.clock.Now(), nil, false)
	return err
}

func (l *Live[E]) submitLocked(e E, now int64, dst []float64, want bool) ([]float64, error) {
	l.lastArr = now
	dst, err := l.p.process(e, now, dst, want)
	l.next++
	if l.waiters > 0 {
		close(l.moved)
		l.moved = make(chan struct{})
	}
	return dst, err
}

// deliver runs and delivers the work queued for the pipeline's workers.
func (l *Live[E]) deliver(ctx context.Context) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.finishWork()
}

// Tick lets the watermark advance on a quiet source: if no event arrived
// for Options.IdleAdvance of clock time, the watermark rises to
// clock − MaxDisorder − IdleAdvance. Run calls it periodically; tests call
// it directly with a fake clock.
func (l *Live[E]) Tick(ctx context.Context) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	if err := l.p.usable(); err != nil {
		return err
	}
	// With workers, rows of submitted events wait for a full batch; a
	// tick delivers them, so a slow source's rows are late by at most a
	// tick.
	if err := l.p.finishWork(); err != nil {
		return err
	}
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
// real time (no ticking if tick is 0). It returns nil when ch is closed,
// ctx's error when ctx ends, and any storage failure at once.
//
// Events the pipeline rejects or finds late are counted in Stats as
// always; Run also logs rejections to Options.Logger (at Warn, the 1st,
// 2nd, 4th, 8th... of this Run, each with the running count, so a clock
// that rejects everything is visible without flooding the log).
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
			err := l.Submit(ctx, e)
			switch {
			case err == nil:
			case benign(err):
				l.noteRejected(err)
			default:
				return err
			}
			if len(ch) == 0 && l.p.work != nil {
				// Nothing more to batch with: deliver the rows now.
				if err := l.deliver(ctx); err != nil {
					return err
				}
			}
		case <-tc:
			if err := l.Tick(ctx); err != nil {
				return err
			}
		}
	}
}

func (l *Live[E]) noteRejected(err error) {
	var re *RejectError
	if !errors.As(err, &re) {
		return
	}
	l.runRej++
	if bits.OnesCount64(l.runRej) != 1 {
		return
	}
	attrs := []any{"reason", re.Reason.String(), "seq", re.Seq, "event_time", re.Time, "rejected_so_far", l.runRej}
	if re.Reason == FutureTime {
		attrs = append(attrs, "clock", l.clock.Now(), "future_skew", l.p.opts.FutureSkew)
	}
	if re.Feature != "" {
		attrs = append(attrs, "feature", re.Feature)
	}
	l.log.Warn("live: event rejected", attrs...)
}

// Advance raises the watermark to w; see Pipeline.Advance.
func (l *Live[E]) Advance(ctx context.Context, w int64) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.Advance(w)
}

// Commit commits the pipeline; see Pipeline.Commit.
func (l *Live[E]) Commit(ctx context.Context, cursor []byte) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.Commit(cursor)
}

// Flush flushes the pipeline; see Pipeline.Flush.
func (l *Live[E]) Flush(ctx context.Context) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.Flush()
}

// Names returns the feature names in row order; see Pipeline.Names.
func (l *Live[E]) Names() []string { return slices.Clone(l.p.names) }

// Stats returns the pipeline's stats. It waits for the core without a
// context: the wait is bounded by one event or one commit. Unlike the
// other methods it may be called from inside Spec.Emit.
func (l *Live[E]) Stats() Stats {
	if l.p.emitting.Load() && calledFromEmit() {
		return l.p.Stats() // the caller already holds the core
	}
	l.sem <- struct{}{}
	defer l.unlock()
	return l.p.Stats()
}

// Close closes the pipeline (committing) and wakes every SubmitInOrder
// call still waiting for its turn with ErrClosed. It waits for the core.
func (l *Live[E]) Close() error {
	if err := l.lock(context.Background()); err != nil {
		return err
	}
	defer l.unlock()
	l.closed = true
	close(l.moved)
	l.moved = make(chan struct{})
	return l.p.Close()
}

// ResetNewest sets the newest event time and the watermark; see
// Pipeline.ResetNewest.
func (l *Live[E]) ResetNewest(ctx context.Context, newest int64) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.ResetNewest(newest)
}

// Lookup is Pipeline.Lookup on the core: safe while other goroutines
// submit events.
func (l *Live[E]) Lookup(ctx context.Context, entity, key string, t int64, dst []float64) ([]float64, bool, error) {
	if err := l.lock(ctx); err != nil {
		return dst, false, err
	}
	defer l.unlock()
	return l.p.Lookup(entity, key, t, dst)
}

// Erase erases one entity key; see Pipeline.Erase. It runs between two
// submissions.
func (l *Live[E]) Erase(ctx context.Context, entity, key string) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.Erase(entity, key)
}

// LiftErasure lifts an erasure; see Pipeline.LiftErasure. It runs between
// two submissions.
func (l *Live[E]) LiftErasure(ctx context.Context, entity, key string) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.LiftErasure(entity, key)
}

// Snapshot writes a consistent copy of the state to dir; see
// Pipeline.Snapshot. Submissions wait while it runs.
func (l *Live[E]) Snapshot(ctx context.Context, dir string) error {
	if err := l.lock(ctx); err != nil {
		return err
	}
	defer l.unlock()
	return l.p.Snapshot(dir)
}

// Entities returns the entity names and, for each, its features' names
// (without the entity prefix), in row order.
func (l *Live[E]) Entities() (names []string, features [][]string) {
	for _, es := range l.p.ents {
		names = append(names, es.ent.Name)
		fs := make([]string, len(es.ent.Features))
		for i, f := range es.ent.Features {
			fs[i] = f.Name
		}
		features = append(features, fs)
	}
	return names, features
}

// ResumeSeq returns the sequence number the last commit covers events
// up to: after a crash, events from there on were lost and must be sent
// again. See Pipeline.ResumeSeq.
func (l *Live[E]) ResumeSeq() uint64 {
	l.sem <- struct{}{}
	defer l.unlock()
	return l.p.ResumeSeq()
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
