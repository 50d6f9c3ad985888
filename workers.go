package tallyward

import (
	"fmt"
	"math"
	"slices"

	"github.com/tallyward/tallyward/internal/store"
)

// With Options.Workers > 1 a pipeline runs in two stages. The caller's
// goroutine stays the sequencer: it numbers events, runs the spec's
// functions (extract), judges time (rejections, lateness, the watermark,
// Settled holding and release) and decides which events are applied and
// in which groups, exactly as with one worker. What touches records
// (apply and the as-of answers) it writes into a batch instead. Each
// worker owns one part of every entity's records (store.PartOf the key)
// and runs, for the whole batch, the entity updates and answers of the
// keys it owns, in batch order; a row is assembled from the parts'
// answers in place and delivered, with the callbacks queued between rows,
// in sequence order once every worker is done.
//
// Rows and state equal those of one worker because each record still
// sees the same events in the same order with the same expiry clock, and
// an answer reads only its own entity's record. Applying a group (one
// Eager event, or all Settled events of one timestamp) before answering
// any of it is kept per part, which is the same as across parts.
//
// Batches are double-buffered: while the workers run one, the sequencer
// fills the next, so the sequencer's work overlaps the records' work.
// Everything else that reads or writes records or the store (Score,
// Commit, Lookup, Erase, Snapshot, Close ...) first waits for both
// batches (finishWork): the parts are idle then, which is the store's
// rule for everything but Get/Insert/Touch (see internal/store/parts.go),
// and a commit cuts every part at the same event.

// batchEvents is how many events a batch holds before it is handed to the
// workers: large enough that the hand-over (a channel send and receive
// per worker) is small beside the batch's work, small enough that rows
// follow events closely.
const batchEvents = 1024

// workBatch is a batch of record work: events to apply and answer, in
// sequence order, and what to deliver afterwards. Per-event fields are
// flat slices (entity i of event j at j*nEnt+i, feature f at j*nFeat+f)
// reused from batch to batch, so filling one allocates nothing.
type workBatch[E any] struct {
	n     int
	seq   []uint64
	t     []int64
	exp   []int64 // expiry clock each event is judged at
	late  []bool
	ev    []E
	keys  []string
	owner []int32 // part owning keys[k]
	on    []bool
	v     []float64
	item  []uint64
	vals  []float64    // answers, written by the workers
	sinks []*[]float64 // per event: where its values are appended at delivery, if anywhere
	// groups holds the end (exclusive) of each run of events applied
	// together before any of them is answered.
	groups []int32
	out    []delivery
	lateEv []E
	parts  []partRun
}

// delivery is one thing to hand to the spec's callbacks once a batch ran.
type delivery struct {
	kind deliveryKind
	i    int32 // event index (row) or lateEv index
	wm   int64 // watermark (OnWatermark)
}

type deliveryKind uint8

const (
	deliverRow deliveryKind = iota
	deliverWatermark
	deliverLate
)

// partRun is one worker's share of a batch.
type partRun struct {
	c     counters // live, tooOld and erasedSkips only
	err   error
	recs  []*record // scratch: the records applied in the current group
	zero  [][]Aggregate
	ahead lookahead
}

func (b *workBatch[E]) reset() {
	b.n = 0
	b.seq, b.t, b.exp, b.late = b.seq[:0], b.t[:0], b.exp[:0], b.late[:0]
	clear(b.ev)
	b.ev = b.ev[:0]
	clear(b.keys)
	b.keys, b.owner = b.keys[:0], b.owner[:0]
	b.on, b.v, b.item, b.vals = b.on[:0], b.v[:0], b.item[:0], b.vals[:0]
	clear(b.sinks)
	b.sinks = b.sinks[:0]
	b.groups, b.out = b.groups[:0], b.out[:0]
	clear(b.lateEv)
	b.lateEv = b.lateEv[:0]
	for i := range b.parts {
		b.parts[i].c, b.parts[i].err = counters{}, nil
	}
}

// workers is the pool behind Options.Workers > 1.
type workers[E any] struct {
	start  []chan *workBatch[E]
	done   chan struct{}
	fill   *workBatch[E] // being filled by the sequencer
	flying *workBatch[E] // being run by the workers, nil if none
	joined bool          // the workers are done with flying (joinWork)
	spare  *workBatch[E]
}

func (p *Pipeline[E]) startWorkers() {
	n := p.opts.Workers
	w := &workers[E]{done: make(chan struct{}, n)}
	newBatch := func() *workBatch[E] {
		b := &workBatch[E]{parts: make([]partRun, n)}
		for i := range b.parts {
			for _, es := range p.ents {
				b.parts[i].zero = append(b.parts[i].zero, es.fresh())
			}
		}
		return b
	}
	w.fill, w.spare = newBatch(), newBatch()
	for i := range n {
		ch := make(chan *workBatch[E], 1)
		w.start = append(w.start, ch)
		go func() {
			for b := range ch {
				p.runPart(i, b)
				w.done <- struct{}{}
			}
		}()
	}
	p.work = w
}

// stopWorkers ends the workers' goroutines; the batches must be finished.
func (p *Pipeline[E]) stopWorkers() {
	if p.work == nil {
		return
	}
	for _, ch := range p.work.start {
		close(ch)
	}
	p.work = nil
}

// queue adds an event to apply and answer as a group of its own (Eager
// events and late events applied at once), or as part of the group
// opened by the previous call when join is set (Settled events of one
// timestamp).
//
// sink, if not nil, receives the event's values at delivery.
func (p *Pipeline[E]) queue(seq uint64, e E, in *inputs, late, join bool, sink *[]float64) {
	b := p.work.fill
	j := b.n
	b.n++
	b.seq = append(b.seq, seq)
	b.t = append(b.t, in.t)
	b.exp = append(b.exp, p.expiryClockFor(in.t, late))
	b.late = append(b.late, late)
	b.ev = append(b.ev, e)
	b.sinks = append(b.sinks, sink)
	b.keys = append(b.keys, in.keys...)
	for _, k := range in.keys {
		b.owner = append(b.owner, int32(store.PartOf(k, len(b.parts))))
	}
	b.on = append(b.on, in.on...)
	b.v = append(b.v, in.v...)
	b.item = append(b.item, in.item...)
	if join && len(b.groups) > 0 && b.groups[len(b.groups)-1] == int32(j) {
		b.groups[len(b.groups)-1]++
	} else {
		b.groups = append(b.groups, int32(j+1))
	}
	b.out = append(b.out, delivery{kind: deliverRow, i: int32(j)})
	p.c.applied++
}

// queueWatermark and queueLate keep a callback in its place among the
// batch's rows.
func (p *Pipeline[E]) queueWatermark(wm int64) {
	b := p.work.fill
	b.out = append(b.out, delivery{kind: deliverWatermark, wm: wm})
}

func (p *Pipeline[E]) queueLate(e E) {
	b := p.work.fill
	b.out = append(b.out, delivery{kind: deliverLate, i: int32(len(b.lateEv))})
	b.lateEv = append(b.lateEv, e)
}

// kickWork hands the filled batch to the workers once it is full (or when
// now is set and it is not empty), first finishing the one in flight.
func (p *Pipeline[E]) kickWork(now bool) error {
	w := p.work
	if w.fill.n < batchEvents && !(now && len(w.fill.out) > 0) {
		return p.err
	}
	if err := p.landWork(); err != nil {
		return err
	}
	b := w.fill
	b.vals = slices.Grow(b.vals[:0], b.n*p.nfeat)[:b.n*p.nfeat]
	for _, ch := range w.start {
		ch <- b
	}
	w.flying, w.fill, w.spare = b, w.spare, nil
	return nil
}

// landWork waits for the batch in flight, if any, and delivers it.
func (p *Pipeline[E]) landWork() error {
	w := p.work
	b := w.flying
	if b == nil {
		return p.err
	}
	p.joinWork()
	w.flying, w.joined = nil, false
	defer func() { b.reset(); w.spare = b }()
	for i := range b.parts {
		pr := &b.parts[i]
		p.c.live += pr.c.live
		p.c.tooOld += pr.c.tooOld
		p.c.erasedSkips += pr.c.erasedSkips
		if pr.err != nil && p.err == nil {
			p.err = pr.err
		}
	}
	if p.err == nil {
		if err := p.store.Err(); err != nil {
			p.err = err
		}
	}
	if p.err != nil {
		// Rows computed after a failure may be wrong; a reopen resumes
		// from the last commit and emits them again.
		return p.err
	}
	nf := p.nfeat
	for _, d := range b.out {
		switch d.kind {
		case deliverRow:
			j := int(d.i)
			if s := b.sinks[j]; s != nil {
				*s = append(*s, b.vals[j*nf:(j+1)*nf]...)
			}
			p.c.emitted++
			if p.spec.Emit != nil {
				row := Row[E]{Seq: b.seq[j], Time: b.t[j], Event: b.ev[j], Late: b.late[j], Values: b.vals[j*nf : (j+1)*nf : (j+1)*nf]}
				runCallback(&p.emitting, func() { p.spec.Emit(row) })
			}
		case deliverWatermark:
			p.spec.OnWatermark(d.wm)
		case deliverLate:
			e := b.lateEv[d.i]
			runCallback(&p.emitting, func() { p.spec.OnLate(e) })
		}
	}
	return nil
}

// idle reports whether nothing is queued or in flight.
func (w *workers[E]) idle() bool { return w.flying == nil && len(w.fill.out) == 0 }

// joinWork waits until the workers are done with the batch in flight,
// without delivering it: after it the parts are idle and may be read
// (Stats) or abandoned (Close after a failure).
func (p *Pipeline[E]) joinWork() {
	w := p.work
	if w == nil || w.flying == nil || w.joined {
		return
	}
	for range w.start {
		<-w.done
	}
	w.joined = true
}

// finishWork runs and delivers everything queued, leaving every part
// idle. A no-op with one worker.
func (p *Pipeline[E]) finishWork() error {
	if p.work == nil {
		return nil
	}
	if err := p.kickWork(true); err != nil {
		return err
	}
	return p.landWork()
}

// runPart is worker w's share of batch b: the entity updates and answers
// of the keys part w owns, group by group in batch order.
func (p *Pipeline[E]) runPart(w int, b *workBatch[E]) {
	pr := &b.parts[w]
	defer func() {
		// A panic in an aggregate (a user's Kind) must not end the
		// process from this goroutine: it fails the pipeline instead.
		if r := recover(); r != nil {
			pr.err = fmt.Errorf("tallyward: worker %d: panic: %v", w, r)
		}
	}()
	ne, nf := len(p.ents), p.nfeat
	planAhead(&pr.ahead, p.ents, w, b.keys, b.owner)
	applied := 0 // keys of the part applied so far (the lookahead's cursor)
	start := 0
	for _, end := range b.groups {
		g := int(end) - start
		pr.recs = slices.Grow(pr.recs[:0], g*ne)[:g*ne]
		clear(pr.recs)
		for j := start; j < int(end); j++ {
			for i, es := range p.ents {
				k := j*ne + i
				if b.owner[k] != int32(w) || b.keys[k] == "" {
					continue
				}
				stepAhead(&pr.ahead, p.ents, w, b.keys, applied)
				applied++
				fs, fe := j*nf+es.first, j*nf+es.first+len(es.kinds)
				rec, err := es.applyKey(es.parts[w], b.keys[k], b.t[j], b.exp[j], b.on[fs:fe], b.v[fs:fe], b.item[fs:fe], p.store, &pr.c)
				if err != nil {
					pr.err = err
					return
				}
				pr.recs[(j-start)*ne+i] = rec
			}
		}
		for j := start; j < int(end); j++ {
			for i, es := range p.ents {
				k := j*ne + i
				fs, fe := j*nf+es.first, j*nf+es.first+len(es.kinds)
				if b.keys[k] == "" {
					if w == 0 {
						for f := fs; f < fe; f++ {
							b.vals[f] = math.NaN()
						}
					}
					continue
				}
				if b.owner[k] != int32(w) {
					continue
				}
				var rec *record
				if g == 1 {
					// As the one-worker Eager path: the record just
					// applied is current even if since evicted.
					rec = pr.recs[i]
				}
				if err := es.valuesOf(es.parts[w], b.keys[k], b.t[j], b.exp[j], rec, b.item[fs:fe], b.vals[fs:fe], p.store, pr.zero[i]); err != nil {
					pr.err = err
					return
				}
			}
		}
		start = int(end)
	}
}
