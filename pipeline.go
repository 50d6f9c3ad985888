package tallyward

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sync/atomic"
	"time"

	"github.com/google/btree"
	"github.com/tallyward/tallyward/internal/attach"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/sketch"
)

// Pipeline computes the features of a Spec over a sequence of events and
// keeps their state in a Pebble store. It is the one synchronous core that
// both the replay driver (Replay) and the live driver (Live) drive: there is
// no other code path for operators, state or emission.
//
// A Pipeline is not safe for concurrent use; Live serialises goroutines
// onto it.
type Pipeline[E any] struct {
	opts  Options
	spec  Spec[E]
	store *store.Store
	ents  []*entityState[E]
	ahead lookahead // hints of the one-worker path (ahead.go)
	names []string  // "entity.feature", in row order
	nfeat int

	// Progress. Invariant: wm <= maxT - MaxDisorder once hasMax, except
	// after Advance or Flush raised it further.
	seen    uint64 // sequence number of the next event
	reread  uint64 // events with seq < reread were seen before the last restart
	hasMax  bool
	maxT    int64
	wm      int64
	flushed bool
	// skipReread holds the sequence numbers, at or after the resume
	// point, of events whose fate hung on the live clock: rejected against
	// it, or dropped as late only because an idle advance had raised the
	// watermark past the newest time. A restart that re-reads them skips
	// them; every other re-read event is judged again exactly, from rr.
	// Sorted, and at most maxSkipReread long so the progress record
	// rewritten at each commit stays small whatever the input.
	skipReread []uint64
	// rr is the newest event time as re-reading rebuilds it (seq <
	// reread): restored as it was just before the resume point.
	rr newestTime
	// The last ResetNewest, so that re-reading across it applies it at
	// the same point: before event resetSeq, the newest time became
	// resetTo. resetWm is the highest watermark before it: events read
	// before the reset and below it were emitted or late then, so a
	// re-read must not hold them again although the watermark went down.
	hasReset       bool
	resetSeq       uint64
	resetTo        newestTime
	resetWm        int64
	lastCommitSeen uint64
	sweptSeen      uint64 // Store.Swept already counted in c
	// Commit latency by MetricsClock, for Stats only.
	lastCommitNanos, commitNanos int64
	commitHist                   [len(CommitBuckets) + 1]uint64

	items itemHashing // how Feature.Item values are hashed; set on Open
	c     counters
	in    inputs // scratch for the current event
	// recs[i] is the record of entity i that apply just updated (nil if
	// none), so the Eager row reads it without a second lookup.
	recs    []*record
	vals    []float64
	held    *btree.BTreeG[*held[E]] // Settled: events waiting for the watermark, in canonical order
	batch   []*held[E]              // Settled: scratch for one timestamp's events
	slab    holdSlab[E]             // Settled: where held events are carved from
	closed  bool
	inBatch bool // Live.SubmitBatch: no automatic commit inside a batch
	// tieItems holds, under a keyed item hash in Settled mode, each
	// feature's unkeyed item hash for the canonical tie-break; scratch.
	tieItems []uint64
	dryRun   bool // precheck: extract counts nothing
	// emitting is set while Spec.Emit or Spec.OnLate runs, so a call back
	// into the pipeline is refused (ErrReentered) rather than corrupting
	// the row being emitted. Atomic because Live reads it from goroutines
	// waiting for the lock.
	emitting atomic.Bool
	inEvent  bool     // process is running (same goroutine only)
	err      error    // sticky storage error
	notices  []string // what Open did beyond the usual (resets)
	// work runs record work on Options.Workers goroutines; nil with one.
	work *workers[E]
	// sink, when set (by Live), receives the values of the events
	// processed with wantVals at their delivery; ownSink is Score's own.
	sink    *[]float64
	ownSink []float64
	// beforeCommit is the caller's commit hook (SetCommitHook); nil: none.
	beforeCommit func(CommitPoint) ([]byte, error)
}

type entityState[E any] struct {
	ent Entity[E]
	// parts cache the entity's records, split by key hash over the
	// pipeline's workers (one part when there are none).
	parts   []*store.Table[*record]
	kinds   []Kind
	first   int         // index of the entity's first feature in a row
	zero    []Aggregate // empty aggregates, to answer for unseen keys
	horizon int64
	ttl     int64         // records idle this long (by the watermark) expire; 0 never
	lay     *recordLayout // how its records are laid out in memory (record.go)
}

// expired reports whether rec has been idle for the entity's ttl as of
// expiry clock w: it then counts as empty, whether or not a commit has
// swept it yet, so expiry never depends on when commits happen.
func (es *entityState[E]) expired(rec *record, w int64) bool {
	return es.ttl > 0 && sat.Add(rec.last, es.ttl) <= w
}

// part returns the part of the entity's records that holds key.
func (es *entityState[E]) part(key string) *store.Table[*record] {
	return es.parts[store.PartOf(key, len(es.parts))]
}

func (es *entityState[E]) fresh() []Aggregate { return es.lay.fresh() }

// inputs are the values extracted from one event, validated before any
// state is touched.
type inputs struct {
	t    int64
	keys []string  // per entity; "" = absent
	on   []bool    // per feature: the event updates it
	v    []float64 // per feature
	item []uint64  // per feature
}

// Open validates spec and opts, opens the store and checks that the stored
// feature definitions match spec. The source must restart at ResumeSeq().
func Open[E any](spec Spec[E], opts Options) (*Pipeline[E], error) {
	opts.EnsureDefaults()
	// One nanosecond more than the allowed disorder keeps as-of answers
	// exact for BeforeEvent features, which ask at the event's time − 1.
	horizon := int64(opts.MaxDisorder) + 1
	err := errors.Join(opts.Validate(), spec.validate(horizon))
	if opts.Mode == Settled && spec.Emit == nil {
		err = errors.Join(err, errors.New("tallyward: Settled mode needs Spec.Emit"))
	}
	if opts.Lateness == DivertLate && spec.OnLate == nil {
		err = errors.Join(err, errors.New("tallyward: DivertLate needs Spec.OnLate"))
	}
	if err != nil {
		return nil, err
	}
	st, err := openStore(opts)
	if err != nil {
		return nil, err
	}
	p := &Pipeline[E]{opts: opts, spec: spec, store: st, wm: math.MinInt64, held: btree.NewG(16, heldLess[E])}
	for _, ent := range spec.Entities {
		es := &entityState[E]{ent: ent, first: p.nfeat, horizon: horizon}
		for _, f := range ent.Features {
			es.kinds = append(es.kinds, f.Kind)
			p.names = append(p.names, ent.Name+"."+f.Name)
		}
		es.lay = newRecordLayout(es.kinds, time.Duration(horizon))
		es.zero = es.fresh()
		es.ttl = ttlFor(ent.Features, opts)
		es.parts = store.NewParts(st, ent.Name, es.ttl, func(b []byte) (*record, error) {
			return es.lay.decode(b)
		}, opts.Workers, peekLast)
		for _, tb := range es.parts {
			tb.HintValue = es.lay.hint
		}
		p.nfeat += len(ent.Features)
		p.ents = append(p.ents, es)
	}
	p.in = inputs{keys: make([]string, len(p.ents)), on: make([]bool, p.nfeat), v: make([]float64, p.nfeat), item: make([]uint64, p.nfeat)}
	p.vals = make([]float64, p.nfeat)
	p.tieItems = make([]uint64, p.nfeat)
	p.recs = make([]*record, len(p.ents))
	if err := p.restore(st.Mark()); err != nil {
		st.Close()
		return nil, err
	}
	if err := p.checkStored(); err != nil {
		st.Close()
		return nil, err
	}
	if err := p.checkDefinitions(); err != nil {
		st.Close()
		return nil, err
	}
	for _, n := range p.notices {
		opts.Logger.Warn(n)
	}
	if len(p.notices) > 0 && !opts.ReadOnly {
		// Make the reset durable before any event is processed, with the
		// progress it changed (records of dropped entities).
		m := st.Mark()
		m.Extra = p.progress().append(nil)
		if err := p.store.Commit(m); err != nil {
			st.Close()
			return nil, err
		}
	}
	p.notices = append(p.notices, st.Notices()...)
	if opts.Workers > 1 {
		p.startWorkers()
	}
	attach.Register(p, st)
	return p, nil
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	return keys
}

// Names returns the feature names ("entity.feature") in row order.
func (p *Pipeline[E]) Names() []string { return slices.Clone(p.names) }

// Resume returns the sequence number at which the source must (re)start:
// 0 for a new store, otherwise the position stored by the last commit.
// Events from Resume up to the last commit's Seen are recognised as
// re-reads and not counted twice.
func (p *Pipeline[E]) ResumeSeq() uint64 { return p.store.Mark().Resume }

// Cursor returns the caller's source cursor stored by the last Commit.
func (p *Pipeline[E]) Cursor() []byte { return slices.Clone(p.store.Mark().Cursor) }

// Watermark returns the current watermark (math.MinInt64 before any event,
// math.MaxInt64 after Flush).
func (p *Pipeline[E]) Watermark() int64 { return p.wm }

// Process consumes the next event of the source. In Eager mode the
// event's row goes to Spec.Emit (if set) at once; in Settled mode it is
// emitted once the watermark passes its time.
//
// A rejected event returns a *RejectError; a late event that is dropped
// or diverted returns ErrLate. Both are counted and leave state untouched;
// the caller may log them and carry on. A call from inside Spec.Emit or
// Spec.OnLate returns ErrReentered and changes nothing. Any other error is
// a storage failure that stops the pipeline.
func (p *Pipeline[E]) Process(e E) error {
	_, err := p.process(e, 0, nil, false)
	return err
}

// Score processes e like Process and appends e's features to dst, as of
// e's time. Eager mode only.
func (p *Pipeline[E]) Score(e E, dst []float64) ([]float64, error) {
	if p.opts.Mode != Eager {
		return dst, ErrNotEager
	}
	return p.process(e, 0, dst, true)
}

func (p *Pipeline[E]) usable() error {
	switch {
	case p.inEvent || p.emitting.Load():
		return ErrReentered
	case p.closed:
		return ErrClosed
	case p.err != nil:
		return p.err
	}
	return nil
}

// process is the core step. now is the live clock (0: none).
func (p *Pipeline[E]) process(e E, now int64, dst []float64, wantVals bool) ([]float64, error) {
	if err := p.usable(); err != nil {
		return dst, err
	}
	// The spec's functions (Time, Key, Where, Value, Item) run inside
	// this call too; one calling back in would overwrite the event being
	// extracted.
	p.inEvent = true
	defer func() { p.inEvent = false }()
	seq := p.seen
	p.seen++
	if seq < p.reread {
		return dst, p.reconsume(e, seq)
	}
	p.c.events++
	if p.flushed {
		p.c.late++
		return dst, ErrFlushed
	}
	before := newestTime{p.hasMax, p.maxT}
	if err := p.extract(e, seq, now, before); err != nil {
		var re *RejectError
		if errors.As(err, &re) && (re.Reason == PastTime || re.Reason == FutureTime && !re.FromNewest) {
			p.skip(seq)
		}
		return dst, err
	}
	t := p.in.t
	late := t < p.wm
	if late {
		p.c.late++
		if p.opts.Lateness != ApplyLate && (!p.hasMax || t > p.maxT) {
			p.skip(seq) // late only because the watermark was raised past the newest time
		}
		switch p.opts.Lateness {
		case DropLate:
			return dst, ErrLate
		case DivertLate:
			if p.work != nil {
				p.queueLate(e)
				if err := p.kickWork(false); err != nil {
					return dst, err
				}
				return dst, ErrLate
			}
			runCallback(&p.emitting, func() { p.spec.OnLate(e) })
			return dst, ErrLate
		}
	}
	if !p.hasMax || t > p.maxT {
		p.hasMax, p.maxT = true, t
	}
	// A lone Score with nothing queued runs on the caller's goroutine, as
	// with one worker: handing one event to the workers and waiting for
	// it would only add latency.
	direct := p.work == nil || wantVals && p.sink == nil && p.work.idle()
	if !direct && (p.opts.Mode == Eager || late) {
		var sink *[]float64
		if wantVals {
			// The row's values are appended to the sink when its batch is
			// delivered: the caller's (Live groups several Score calls
			// into one batch), else this call's, delivered below.
			if sink = p.sink; sink == nil {
				p.ownSink = dst
				sink = &p.ownSink
			}
		}
		p.queue(seq, e, &p.in, late, false, sink)
	} else if p.opts.Mode == Eager || late {
		if err := p.apply(&p.in, late); err != nil {
			return dst, err
		}
		p.valuesAt(&p.in, p.vals, p.recs, late)
		p.emit(seq, t, e, late)
		if wantVals {
			dst = append(dst, p.vals...)
		}
	} else {
		h := p.slab.hold(seq, p.in.tieBreak(p.tieItemHashes()), e, &p.in)
		h.before = before
		if old, ok := p.held.ReplaceOrInsert(h); ok {
			p.slab.release(old) // never expected: sequence numbers are unique
		}
	}
	p.raiseWatermark(sat.Sub(p.maxT, int64(p.opts.MaxDisorder)))
	if p.work != nil {
		if wantVals && p.sink == nil {
			// Score answers before it returns, with its event's
			// callbacks delivered, as with one worker.
			err := p.finishWork()
			if !direct {
				dst, p.ownSink = p.ownSink, nil
			}
			if err != nil {
				return dst, err
			}
		} else if err := p.kickWork(false); err != nil {
			return dst, err
		}
	}
	if err := p.autoCommit(); err != nil {
		return dst, err
	}
	return dst, p.err
}

// autoCommit commits if Options.CommitEvery events came since the last
// commit (and no batch is in progress).
func (p *Pipeline[E]) autoCommit() error {
	if p.err == nil && !p.inBatch && !p.opts.ReadOnly &&
		(p.opts.CommitEvery > 0 && p.seen-p.lastCommitSeen >= uint64(p.opts.CommitEvery) || p.store.OverBudget()) {
		// Off the caller's path: the write runs while processing goes
		// on; only the next commit waits for it.
		return p.commit(nil, true)
	}
	return nil
}

// reconsume handles an event re-read after a restart (seq < reread): it
// was counted before, and either handled (time below the stored
// watermark, or rejected) or still held; held ones are held again. Its
// fate is decided as it was the first time: by the newest time as it was
// then (rr, rebuilt event by event), or by the skip list where the live
// clock decided.
func (p *Pipeline[E]) reconsume(e E, seq uint64) error {
	if p.hasReset && seq == p.resetSeq {
		p.rr = p.resetTo
	}
	if _, found := slices.BinarySearch(p.skipReread, seq); found {
		return nil
	}
	before := p.rr
	if err := p.extract(e, seq, 0, before); err != nil {
		return nil // rejected the first time too; already counted
	}
	if !p.rr.has || p.in.t > p.rr.t {
		p.rr = newestTime{true, p.in.t}
	}
	w := p.wm
	if p.hasReset && seq < p.resetSeq {
		w = max(w, p.resetWm)
	}
	if p.opts.Mode == Settled && p.in.t >= w {
		h := p.slab.hold(seq, p.in.tieBreak(p.tieItemHashes()), e, &p.in)
		h.before = before
		if old, ok := p.held.ReplaceOrInsert(h); ok {
			p.slab.release(old) // never expected: sequence numbers are unique
		}
	}
	return nil
}

// extract fills p.in from e and validates it. Nothing is touched on error
// except the rejection counters. now is the live clock (0: none); newest
// is the newest event time before e, which the future check is against.
func (p *Pipeline[E]) extract(e E, seq uint64, now int64, newest newestTime) error {
	t := p.spec.Time(e)
	p.in.t = t
	reject := func(r Reason, feature string, limit int64, fromNewest bool) error {
		if seq >= p.reread && !p.dryRun {
			p.c.rejected[r]++
		}
		return &RejectError{Reason: r, Seq: seq, Time: t, Feature: feature, Limit: limit, FromNewest: fromNewest}
	}
	if t == 0 {
		return reject(ZeroTime, "", 0, false)
	}
	if t < p.opts.EarliestTime {
		return reject(OutOfRange, "", p.opts.EarliestTime, false)
	}
	if t > p.opts.LatestTime {
		return reject(OutOfRange, "", p.opts.LatestTime, false)
	}
	skew := int64(p.opts.FutureSkew)
	if newest.has && t > sat.Add(newest.t, skew) {
		return reject(FutureTime, "", sat.Add(newest.t, skew), true)
	}
	if now != 0 {
		if lim := sat.Add(now, skew); t > lim {
			return reject(FutureTime, "", lim, false)
		}
		if lim := sat.Sub(now, int64(p.opts.PastSkew)); p.opts.PastSkew > 0 && t < lim {
			return reject(PastTime, "", lim, false)
		}
	}
	for i, es := range p.ents {
		key := es.ent.Key(e)
		p.in.keys[i] = key
		for j := range es.ent.Features {
			f := &es.ent.Features[j]
			fi := es.first + j
			on := key != "" && (f.Where == nil || f.Where(e))
			p.in.on[fi] = on
			p.in.v[fi], p.in.item[fi], p.tieItems[fi] = 0, 0, 0
			if key != "" && f.Item != nil {
				// Extracted even when the event does not update the
				// feature: a frequency answers about the asking item.
				s := f.Item(e)
				p.in.item[fi] = p.items.hash(s)
				if p.items.keyed && p.opts.Mode == Settled {
					// The canonical order must not depend on the store's
					// item key, or two stores (a backfill and the live
					// one) would emit tied rows in different orders.
					p.tieItems[fi] = sketch.HashString(s)
				}
			}
			if !on {
				continue
			}
			if f.Kind.Inputs()&TakesValue != 0 {
				v := 1.0
				if f.Value != nil {
					v = f.Value(e)
				}
				if !(math.Abs(v) <= MaxValue) {
					return reject(BadValue, p.names[fi], 0, false)
				}
				p.in.v[fi] = v
			}
		}
	}
	return nil
}

// apply updates the records of every entity the event names. Every part
// must be idle (the caller's goroutine does the work).
func (p *Pipeline[E]) apply(in *inputs, late bool) error {
	exp := p.expiryClockFor(in.t, late)
	p.hintEvent(in.keys)
	for i, es := range p.ents {
		key := in.keys[i]
		fs := es.first
		fe := fs + len(es.kinds)
		rec, err := es.applyKey(es.part(key), key, in.t, exp, in.on[fs:fe], in.v[fs:fe], in.item[fs:fe], p.store, &p.c)
		p.recs[i] = rec
		if err != nil {
			p.err = err
			return err
		}
	}
	p.c.applied++
	if err := p.store.Err(); err != nil {
		p.err = err
		return err
	}
	return nil
}

// applyKey updates the record of key (in part tb) with one event at t
// whose inputs for this entity's features are on, v and item, judging
// expiry at exp. It returns the record updated, nil if none was (no
// feature of the entity takes the event, the key is absent or erased).
// It touches only tb, the counters c and (reading) the store's
// tombstones, so parts run it concurrently.
func (es *entityState[E]) applyKey(tb *store.Table[*record], key string, t, exp int64, on []bool, v []float64, item []uint64, st *store.Store, c *counters) (*record, error) {
	if key == "" || !slices.Contains(on, true) {
		return nil, nil
	}
	sl, err := tb.Get(key)
	if err != nil {
		return nil, err
	}
	if sl == nil {
		if st.Erased(es.ent.Name, key) {
			c.erasedSkips++
			return nil, nil
		}
		sl = tb.Insert(key, es.lay.recordFor(tb, t))
		c.live++
	} else if es.expired(sl.Value, exp) {
		sl.Value.reset()
	}
	rec := sl.Value
	for j := range rec.features() {
		if on[j] && !rec.agg(j).Add(t, v[j], item[j]) {
			c.tooOld++
		}
	}
	rec.last = max(rec.last, t)
	tb.Touch(sl)
	return rec, nil
}

// valuesAt writes the features of the event described by in, as of its
// time, to out. recs, if not nil, holds records just updated by apply (an
// evicted record is still current: nothing changed it since).
func (p *Pipeline[E]) valuesAt(in *inputs, out []float64, recs []*record, late bool) {
	exp := p.expiryClockFor(in.t, late)
	for i, es := range p.ents {
		var rec *record
		if recs != nil {
			rec = recs[i]
		}
		key := in.keys[i]
		fs := es.first
		fe := fs + len(es.kinds)
		if err := es.valuesOf(es.part(key), key, in.t, exp, rec, in.item[fs:fe], out[fs:fe], p.store, es.zero); err != nil {
			p.err = err
		}
	}
}

// valuesOf writes the entity's features for key, as of an event at t
// whose item hashes for them are item, to out: from rec if not nil (the
// record apply just updated), else from tb, judging expiry at exp. Like
// applyKey it is safe to run concurrently on different parts.
//
// zero holds the entity's empty aggregates, to answer for unseen keys;
// each worker has its own, as an aggregate's At need not be safe for
// concurrent use.
func (es *entityState[E]) valuesOf(tb *store.Table[*record], key string, t, exp int64, rec *record, item []uint64, out []float64, st *store.Store, zero []Aggregate) error {
	if key == "" {
		for j := range out {
			out[j] = math.NaN()
		}
		return nil
	}
	var err error
	if rec == nil {
		switch sl, gerr := tb.Get(key); {
		case gerr != nil:
			err = gerr
		case sl != nil && !es.expired(sl.Value, exp):
			rec = sl.Value
		case sl == nil && st.Erased(es.ent.Name, key):
			for j := range out {
				out[j] = math.NaN()
			}
			return nil
		}
	}
	for j := range zero {
		a := zero[j]
		if rec != nil {
			a = rec.agg(j)
		}
		at := t
		if es.ent.Features[j].BeforeEvent {
			if at == math.MinInt64 {
				a = zero[j] // nothing is before the first instant; t-1 would wrap
			} else {
				at--
			}
		}
		out[j] = a.At(at, item[j])
	}
	return err
}

func (p *Pipeline[E]) emit(seq uint64, t int64, e E, late bool) {
	p.c.emitted++
	if p.spec.Emit != nil {
		runCallback(&p.emitting, func() { p.spec.Emit(Row[E]{Seq: seq, Time: t, Event: e, Late: late, Values: p.vals}) })
	}
}

// runCallback runs a user callback with flag set. Live recognises a call
// made from inside a callback by this frame on the caller's stack, so it
// must stay a named, non-inlined function.
//
//go:noinline
func runCallback(flag *atomic.Bool, fn func()) {
	flag.Store(true)
	defer flag.Store(false)
	fn()
}

// raiseWatermark moves the watermark up to w (never down) and, in Settled
// mode, applies and emits every held event it passes.
func (p *Pipeline[E]) raiseWatermark(w int64) {
	if w <= p.wm {
		return
	}
	p.wm = w
	for p.err == nil {
		first, ok := p.held.Min()
		if !ok || first.in.t >= p.wm {
			break
		}
		// Apply every event of the earliest timestamp before emitting any
		// of them, so each row covers all events at its time.
		t := first.in.t
		p.batch = p.batch[:0]
		for h, ok := p.held.Min(); ok && h.in.t == t; h, ok = p.held.Min() {
			p.batch = append(p.batch, h)
			p.held.DeleteMin()
		}
		if p.work != nil {
			for i, h := range p.batch {
				p.queue(h.seq, h.e, &h.in, false, i > 0, nil)
				p.slab.release(h) // queue copied it
			}
			clear(p.batch)
			// A full batch goes to the workers between timestamps, never
			// inside one: a group is applied whole before it is answered.
			if p.kickWork(false) != nil {
				return
			}
			continue
		}
		for _, h := range p.batch {
			if p.apply(&h.in, false) != nil {
				return
			}
		}
		// A timestamp of one event (the usual case) answers from the
		// records apply just updated, as Eager does, sparing a second
		// lookup; in a larger group a later event may have evicted and
		// reloaded a record, so each answer looks its records up.
		var recs []*record
		if len(p.batch) == 1 {
			recs = p.recs
		}
		for _, h := range p.batch {
			p.valuesAt(&h.in, p.vals, recs, false)
			p.emit(h.seq, t, h.e, false)
		}
		for _, h := range p.batch {
			p.slab.release(h)
		}
		clear(p.batch)
	}
	if p.err == nil && p.spec.OnWatermark != nil {
		if p.work != nil {
			p.queueWatermark(p.wm)
		} else {
			p.spec.OnWatermark(p.wm)
		}
	}
}

// syncSwept counts the records that commits landed since the last call
// removed as expired.
func (p *Pipeline[E]) syncSwept() {
	d := p.store.Swept() - p.sweptSeen
	p.sweptSeen += d
	p.c.expired += d
	p.c.live -= int64(d)
}

// expiryClock is the time records expire by: the watermark as the data
// alone define it (newest time − MaxDisorder). Raises of the watermark by
// Flush or an idle Advance do not count, so the end of a replay keeps its
// state, and expiry never depends on a wall clock.
func (p *Pipeline[E]) expiryClock() int64 {
	if !p.hasMax {
		return math.MinInt64
	}
	return sat.Sub(p.maxT, int64(p.opts.MaxDisorder))
}

// expiryClockFor is the expiry clock for an event at t. A Settled event
// is applied and answered once the watermark has passed it, possibly far
// past it after a quiet spell; judged by the current clock, its entity
// could read as expired although nothing within reach of t had aged out.
// Judging it at t at the latest keeps its answer as of its own time, and
// agrees with every sweep: held events are never below the data watermark
// a commit sweeps by. For Eager events t is at least the clock.
//
// A late event (applied under ApplyLate) is the exception: it is below
// the data watermark, so a commit may already have swept a record that
// was alive at its time but is expired by the clock. Judged at t, its
// answer would depend on when commits ran (cache size, commit interval,
// the workers' timing); judged by the clock, a record expired by the
// clock reads as new whether or not a sweep removed it yet.
func (p *Pipeline[E]) expiryClockFor(t int64, late bool) int64 {
	if late {
		return p.expiryClock()
	}
	return min(p.expiryClock(), t)
}

// Advance raises the watermark to w if w is higher, emitting the Settled
// rows it passes. Live mode calls it when the source is idle; events below
// the new watermark become late.
func (p *Pipeline[E]) Advance(w int64) error {
	if err := p.usable(); err != nil {
		return err
	}
	p.raiseWatermark(w)
	if err := p.finishWork(); err != nil {
		return err
	}
	return p.err
}

// Flush raises the watermark to +infinity, emitting every held row: the
// end of a finite source. Later events are refused with ErrFlushed.
func (p *Pipeline[E]) Flush() error {
	if err := p.Advance(math.MaxInt64); err != nil {
		return err
	}
	p.flushed = true
	return nil
}

// ResetNewest sets the newest event time to newest and the watermark to
// newest − MaxDisorder (lower or higher than now), then commits. It is
// the way out, short of deleting the store, when a stray event within
// [EarliestTime, LatestTime] set a wrong newest time: one far ahead makes
// every later event late (Stats.Late climbs while Stats.Applied stands
// still); one far behind, as the first event, makes every later event a
// FutureTime rejection whose error names the newest time as its limit.
// The newest time and the watermark are durable, so restarting does not
// help, and this is the only call that moves the watermark back.
//
// What it does not undo:
//   - records the stray event was applied to (Eager mode, ApplyLate)
//     keep it, and an aggregate refuses updates far behind its own newest
//     time (Stats.TooOld): Erase those keys and LiftErasure them, or let
//     them expire;
//   - Settled events held above the new watermark stay held until it
//     passes them (Flush emits them at the end of a replay);
//   - rows already emitted stand, and events dropped as late are gone:
//     re-feed them from the source, as new events, if they matter;
//   - TTL expiry follows the newest time, so lowering it can revive
//     records not yet swept.
//
// newest must be within [EarliestTime, LatestTime]; after Flush it is
// refused with ErrFlushed.
func (p *Pipeline[E]) ResetNewest(newest int64) error {
	if err := p.usable(); err != nil {
		return err
	}
	if p.flushed {
		return ErrFlushed
	}
	if newest < p.opts.EarliestTime || newest > p.opts.LatestTime || newest == 0 {
		return fmt.Errorf("tallyward: ResetNewest(%d): %w [%d, %d]", newest, ErrOutOfRange, p.opts.EarliestTime, p.opts.LatestTime)
	}
	if !p.hasReset {
		p.resetWm = p.wm
	}
	p.hasMax, p.maxT = true, newest
	p.hasReset, p.resetSeq, p.resetTo, p.resetWm = true, p.seen, newestTime{true, newest}, max(p.resetWm, p.wm)
	if w := sat.Sub(newest, int64(p.opts.MaxDisorder)); w < p.wm {
		p.wm = w
	} else {
		p.raiseWatermark(w)
	}
	return p.Commit(nil)
}

// Commit durably stores all state changed since the last commit together
// with the source position (and the caller's cursor, if not nil; nil keeps
// the previous one), in one synced batch.
func (p *Pipeline[E]) Commit(cursor []byte) error {
	if err := p.usable(); err != nil {
		return err
	}
	return p.commit(cursor, false)
}

// commit is Commit without the re-entry check (the automatic commit runs
// inside process); async leaves the write to the store's background
// goroutine (automatic commits: the caller does not need it durable on
// return, and a crash before it lands resumes from the one before).
func (p *Pipeline[E]) commit(cursor []byte, async bool) error {
	if p.opts.ReadOnly {
		return ErrReadOnly
	}
	began := p.opts.MetricsClock.Now()
	// Every part idle and every queued row out: the commit cuts all parts
	// at this event.
	if err := p.finishWork(); err != nil {
		return err
	}
	// Settle first: the previous commit must land before this one is cut,
	// and Mark then reports it.
	if err := p.store.Settle(); err != nil {
		p.err = err
		return err
	}
	p.syncSwept()
	m := store.Mark{Seen: p.seen, Resume: p.seen, Watermark: p.wm, Cursor: cursor}
	if cursor == nil {
		m.Cursor = p.store.Mark().Cursor
	}
	resumeNewest := newestTime{p.hasMax, p.maxT}
	p.held.Ascend(func(h *held[E]) bool {
		if h.seq < m.Resume {
			m.Resume, resumeNewest = h.seq, h.before
		}
		return true
	})
	// Only events at or after the resume point can be re-read.
	i, _ := slices.BinarySearch(p.skipReread, m.Resume)
	p.skipReread = slices.Delete(p.skipReread, 0, i)
	if p.hasReset && p.resetSeq < m.Resume {
		p.hasReset = false
	}
	if err := p.runCommitHook(&m); err != nil {
		return err
	}
	// The commit's goroutine fixes the Mark once it knows how many
	// records the commit removes; it sees the progress as of the cut.
	pr := p.progress()
	pr.resumeNewest = resumeNewest
	pr.skipReread = slices.Clone(pr.skipReread)
	err := p.store.SweepCommitAsync(p.expiryClock(), func(removed int) store.Mark {
		pr.c.expired += uint64(removed)
		pr.c.live -= int64(removed)
		m.Extra = pr.append(nil)
		return m
	})
	if err == nil && !async {
		err = p.store.Settle()
		p.syncSwept()
		p.store.DropSwept()
	}
	if err != nil {
		p.err = err
		return err
	}
	p.lastCommitSeen = p.seen
	p.lastCommitNanos = p.opts.MetricsClock.Now() - began
	p.commitNanos += p.lastCommitNanos
	p.commitHist[commitBucket(time.Duration(p.lastCommitNanos))]++
	return nil
}

// Close commits (unless the pipeline failed) and closes the store.
func (p *Pipeline[E]) Close() error {
	if p.closed {
		return nil
	}
	if p.inEvent || p.emitting.Load() {
		return ErrReentered
	}
	var err error
	if p.err == nil {
		err = p.finishWork() // rows still queued go out, read-only or not
	}
	if err == nil && p.err == nil && !p.opts.ReadOnly {
		err = p.Commit(nil)
	}
	p.joinWork() // after a failure: the workers must be done with the store
	p.stopWorkers()
	p.closed = true
	attach.Unregister(p)
	return errors.Join(err, p.store.Close())
}

// held is an event waiting for the watermark in Settled mode.
type held[E any] struct {
	seq    uint64
	tie    uint64
	e      E
	in     inputs
	before newestTime    // the newest event time just before it arrived
	from   *holdChunk[E] // where it was carved (holdSlab)
}

// newestTime is an optional newest event time.
type newestTime struct {
	has bool
	t   int64
}

// maxSkipReread bounds Pipeline.skipReread. Past it, a re-read event
// whose fate hung on the live clock is judged by event times alone.
const maxSkipReread = 1024

func (p *Pipeline[E]) skip(seq uint64) {
	if len(p.skipReread) < maxSkipReread {
		p.skipReread = append(p.skipReread, seq)
	}
}

// heldLess orders held events canonically: by time, then by a hash of the
// event's extracted inputs (an order-free tie-break: two events with equal
// time and hash have identical inputs, so their order cannot change
// state), then by sequence number so the order is total.
func heldLess[E any](a, b *held[E]) bool {
	if a.in.t != b.in.t {
		return a.in.t < b.in.t
	}
	if a.tie != b.tie {
		return a.tie < b.tie
	}
	return a.seq < b.seq
}

// precheck reports the first of es, taken as the next events in order,
// that process would refuse (rejected, late under a policy that does not
// apply late events, or after Flush), as a *BatchError, without consuming
// or counting anything: so a batch can be taken whole or not at all.
func (p *Pipeline[E]) precheck(es []E, now int64) error {
	if err := p.usable(); err != nil {
		return err
	}
	hasMax, maxT, wm := p.hasMax, p.maxT, p.wm
	for i, e := range es {
		seq := p.seen + uint64(i)
		if seq < p.reread {
			continue // a re-read is never refused
		}
		if p.flushed {
			return &BatchError{Index: i, Err: ErrFlushed}
		}
		p.dryRun = true
		err := p.extract(e, seq, now, newestTime{hasMax, maxT})
		p.dryRun = false
		if err != nil {
			return &BatchError{Index: i, Err: err}
		}
		t := p.in.t
		if t < wm && p.opts.Lateness != ApplyLate {
			return &BatchError{Index: i, Err: &LateError{Time: t, Watermark: wm}}
		}
		if !hasMax || t > maxT {
			hasMax, maxT = true, t
		}
		wm = max(wm, sat.Sub(maxT, int64(p.opts.MaxDisorder)))
	}
	return nil
}

// tieItemHashes is the item hash of each feature that the canonical
// tie-break folds: the unkeyed one, whatever the store's item key, so the
// order of tied events is the same in every store.
func (p *Pipeline[E]) tieItemHashes() []uint64 {
	if p.items.keyed {
		return p.tieItems
	}
	return p.in.item
}
