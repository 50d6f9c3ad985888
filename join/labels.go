package join

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"strings"
	"time"

	"github.com/google/btree"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// LabelSpec describes a label join: events that get a training row, and
// the later outcome events that label them.
type LabelSpec[E any] struct {
	// Name keys the join's state in the store; [A-Za-z0-9_.-]. Required.
	Name string
	// Maturity is M: a row carries the outcomes with times in
	// (event time, event time + M]. Required, > 0.
	Maturity time.Duration
	// ID returns the id of an event that gets a training row; "" for
	// events that get none. Required.
	ID func(E) string
	// Ref returns the id of the event an outcome refers to; "" for events
	// that are not outcomes. Required.
	Ref func(E) string
	// Labels are the label kinds, one column each. Required.
	Labels []Label[E]
	// Sink receives the rows. Required.
	Sink RowSink
	// OnUnmatched, if set, receives each outcome that attached to no held
	// event (unknown id, event already matured, or outcome not later than
	// its event). Such outcomes are counted in LabelStats.Unmatched
	// either way. Default: nil.
	OnUnmatched func(E)
}

// Label is one label kind.
type Label[E any] struct {
	// Name is the column name. Required.
	Name string
	// Match selects the outcome events of this kind. Required.
	Match func(E) bool
	// Value is the label an outcome sets. Default: 1.
	Value func(E) float64
	// Missing is the label of an event that got no outcome of this kind
	// by maturity. Default: 0.
	Missing float64
}

// Validate reports every problem with s at once.
func (s *LabelSpec[E]) Validate() error {
	var errs []error
	if !validName(s.Name) {
		errs = append(errs, fmt.Errorf("join: label join name %q must be non-empty [A-Za-z0-9_.-]", s.Name))
	}
	if s.Maturity <= 0 {
		errs = append(errs, fmt.Errorf("join: label join %q: Maturity %v must be > 0", s.Name, s.Maturity))
	}
	if s.ID == nil {
		errs = append(errs, fmt.Errorf("join: label join %q: ID is required", s.Name))
	}
	if s.Ref == nil {
		errs = append(errs, fmt.Errorf("join: label join %q: Ref is required", s.Name))
	}
	if s.Sink == nil {
		errs = append(errs, fmt.Errorf("join: label join %q: Sink is required", s.Name))
	}
	if len(s.Labels) == 0 {
		errs = append(errs, fmt.Errorf("join: label join %q has no labels", s.Name))
	}
	if len(s.Labels) > 64 {
		errs = append(errs, fmt.Errorf("join: label join %q: %d labels, at most 64", s.Name, len(s.Labels)))
	}
	seen := map[string]bool{}
	for i, l := range s.Labels {
		if l.Name == "" || seen[l.Name] {
			errs = append(errs, fmt.Errorf("join: label join %q: label %d: name %q empty or repeated", s.Name, i, l.Name))
		}
		seen[l.Name] = true
		if l.Match == nil {
			errs = append(errs, fmt.Errorf("join: label join %q: label %q: Match is required", s.Name, l.Name))
		}
	}
	return errors.Join(errs...)
}

// LabelStats are a label join's counters; they are committed with its
// state.
type LabelStats struct {
	Held       int    // events waiting to mature
	HeldBytes  int    // their approximate memory
	Rows       uint64 // rows written (the next row's Seq)
	Attached   uint64 // outcomes attached to a held event
	Unmatched  uint64 // outcomes that attached to nothing (see LabelSpec.OnUnmatched)
	Duplicates uint64 // events whose id was already held (the first is kept)
}

// Labels is a running label join. It consumes a pipeline's rows (Emit) and
// watermark (OnWatermark); use OpenLabels, or set those two Spec
// functions yourself and call Attach before the first event.
//
// Every event with an id is held, with a copy of its row, until it
// matures: until the watermark passes its time + M (all outcomes up to
// then have arrived, or are late and dropped), or, at the end of a finite
// replay (Flush), until the newest event time reaches it. Then it is
// written to the sink with, per label kind, the value of the latest
// outcome of that kind with time in (t, t+M] (ties at one time: the
// greatest value), or Missing. An event that never matures is never
// written: no row is a negative by default.
//
// Rows go to the sink in (time + M, id) order. With a Settled pipeline,
// rows and their order depend only on the events, not on their arrival
// order within MaxDisorder, and each row's features are the Settled
// features at its event's time. With an Eager pipeline the features are
// the Eager ones, and an outcome that arrives before its event is
// unmatched.
//
// Held events live in the pipeline's store under the join's name and are
// written by each commit, after the sink was flushed: after a crash the
// join resumes from the last commit, and rows from it on are written again
// with the same Seq.
//
// Concurrency: as the pipeline (Live serialises it).
type Labels[E any] struct {
	spec     LabelSpec[E]
	maturity int64
	labels   []string
	attached bool

	held  map[string]*heldEvent
	order *btree.BTreeG[*heldEvent] // by (due, id)
	// dirty holds the ids changed since the last commit (held or gone).
	dirty     map[string]struct{}
	metaDirty bool
	newest    int64 // newest row time seen; math.MinInt64 before any
	bytes     int
	st        LabelStats
	row       TrainingRow
	err       error // sticky: sink or decoding failure
}

type heldEvent struct {
	id     string
	t, due int64
	vals   []float64
	labels []float64
	set    uint64  // bit i: labels[i] was set by an outcome
	at     []int64 // time of the outcome that set labels[i]
}

func (h *heldEvent) size() int { return 96 + len(h.id) + 8*len(h.vals) + 16*len(h.labels) }

func heldLess(a, b *heldEvent) bool {
	if a.due != b.due {
		return a.due < b.due
	}
	return a.id < b.id
}

// NewLabels validates spec and makes a label join to be attached to a
// pipeline.
func NewLabels[E any](spec LabelSpec[E]) (*Labels[E], error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	j := &Labels[E]{spec: spec, maturity: int64(spec.Maturity), held: map[string]*heldEvent{},
		order: btree.NewG(16, heldLess), dirty: map[string]struct{}{}, newest: math.MinInt64}
	for _, l := range spec.Labels {
		j.labels = append(j.labels, l.Name)
	}
	return j, nil
}

// OpenLabels opens a pipeline whose rows feed a new label join (chaining
// any Emit and OnWatermark already in spec) and attaches the join.
func OpenLabels[E any](spec tallyward.Spec[E], opts tallyward.Options, ls LabelSpec[E]) (*tallyward.Pipeline[E], *Labels[E], error) {
	j, err := NewLabels(ls)
	if err != nil {
		return nil, nil, err
	}
	spec.Emit = chainEmit(spec.Emit, j.Emit)
	spec.OnWatermark = chainWatermark(spec.OnWatermark, j.OnWatermark)
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		return nil, nil, err
	}
	if err := j.Attach(p); err != nil {
		p.Close()
		return nil, nil, err
	}
	return p, j, nil
}

func chainEmit[E any](a, b func(tallyward.Row[E])) func(tallyward.Row[E]) {
	if a == nil {
		return b
	}
	return func(r tallyward.Row[E]) { a(r); b(r) }
}

func chainWatermark(a, b func(int64)) func(int64) {
	if a == nil {
		return b
	}
	return func(w int64) { a(w); b(w) }
}

// Attach loads the join's committed state from p's store, registers it
// with p's commits and tells the sink the columns. Call it once, right
// after tallyward.Open and before any event.
func (j *Labels[E]) Attach(p *tallyward.Pipeline[E]) error {
	desc := fmt.Sprintf("label v1 maturity=%d features=%s labels=%s", j.maturity, strings.Join(p.Names(), ","), strings.Join(j.labels, ","))
	if err := attachPart(p, "label."+j.spec.Name, desc, labelPart[E]{j}, j.load); err != nil {
		return err
	}
	j.attached = true
	return j.spec.Sink.Begin(p.Names(), j.labels)
}

// Err returns the sticky error that stopped the join (a sink failure);
// it also fails the pipeline's next commit.
func (j *Labels[E]) Err() error { return j.err }

// Stats returns the join's counters.
func (j *Labels[E]) Stats() LabelStats {
	s := j.st
	s.Held, s.HeldBytes = len(j.held), j.bytes
	return s
}

// Emit consumes one pipeline row; set it as (or call it from) Spec.Emit.
func (j *Labels[E]) Emit(r tallyward.Row[E]) {
	if j.err != nil {
		return
	}
	if !j.attached {
		j.err = ErrNotAttached
		return
	}
	if r.Time > j.newest {
		j.newest = r.Time
	}
	j.metaDirty = true
	if ref := j.spec.Ref(r.Event); ref != "" {
		j.outcome(ref, r)
	}
	id := j.spec.ID(r.Event)
	if id == "" {
		return
	}
	if j.held[id] != nil {
		j.st.Duplicates++
		return
	}
	// One allocation for the row and the labels, which live and die
	// together.
	nv, nl := len(r.Values), len(j.spec.Labels)
	buf := make([]float64, nv+nl)
	copy(buf, r.Values)
	h := &heldEvent{id: id, t: r.Time, due: sat.Add(r.Time, j.maturity), vals: buf[:nv:nv],
		labels: buf[nv:], at: make([]int64, nl)}
	for i, l := range j.spec.Labels {
		h.labels[i] = l.Missing
	}
	j.hold(h)
}

func (j *Labels[E]) hold(h *heldEvent) {
	j.held[h.id] = h
	j.order.ReplaceOrInsert(h)
	j.bytes += h.size()
	j.dirty[h.id] = struct{}{}
}

func (j *Labels[E]) outcome(ref string, r tallyward.Row[E]) {
	h := j.held[ref]
	if h == nil || r.Time <= h.t || r.Time > h.due {
		j.st.Unmatched++
		if j.spec.OnUnmatched != nil {
			j.spec.OnUnmatched(r.Event)
		}
		return
	}
	j.st.Attached++
	for i, l := range j.spec.Labels {
		if !l.Match(r.Event) {
			continue
		}
		v := 1.0
		if l.Value != nil {
			v = l.Value(r.Event)
		}
		// The latest outcome wins; at one time, the greatest value, so
		// the label does not depend on the order of equal-time rows.
		bit := uint64(1) << i
		if h.set&bit == 0 || r.Time > h.at[i] || (r.Time == h.at[i] && v > h.labels[i]) {
			h.labels[i], h.at[i] = v, r.Time
			h.set |= bit
		}
	}
	j.dirty[h.id] = struct{}{}
}

// OnWatermark writes every held event that has matured by w; set it as
// (or call it from) Spec.OnWatermark.
func (j *Labels[E]) OnWatermark(w int64) {
	if j.err != nil || !j.attached {
		return
	}
	clock := w
	if w == math.MaxInt64 {
		// The end of a finite replay says nothing about time passing:
		// only what the newest event time reaches has matured.
		clock = sat.Add(j.newest, 1)
	}
	for {
		h, ok := j.order.Min()
		if !ok || h.due >= clock {
			return
		}
		j.row = TrainingRow{Seq: j.st.Rows, ID: h.id, Time: h.t, Features: h.vals, Labels: h.labels}
		if err := j.spec.Sink.Write(&j.row); err != nil {
			j.err = fmt.Errorf("join: label join %q: sink: %w", j.spec.Name, err)
			return
		}
		j.st.Rows++
		j.metaDirty = true
		j.order.DeleteMin()
		delete(j.held, h.id)
		j.bytes -= h.size()
		j.dirty[h.id] = struct{}{}
	}
}

// Stored layout under part "label.<name>" (tag 0x06, see internal/store):
//
//	"d"        -> the join's definition as text (see attachPart)
//	"m"        -> byte version (1) | varint newest | uvarint rows,
//	              attached, unmatched, duplicates
//	"e" | id   -> byte version (1) | varint time | varint due |
//	              floats row | floats labels | uvarint set bits |
//	              uvarint n, n varint outcome times
//
// floats: uvarint count, then 8 bytes little-endian IEEE 754 bits each.
const labelVersion1 = 1

// The join as a store.Part, kept off the public method set.
type labelPart[E any] struct{ j *Labels[E] }

func (p labelPart[E]) Stage(w *store.PartWriter) error { return p.j.stage(w) }

// stage flushes the sink (rows a commit covers must be durable first),
// then writes what changed since the last commit.
func (j *Labels[E]) stage(w *store.PartWriter) error {
	if j.err != nil {
		return j.err
	}
	if err := j.spec.Sink.Flush(); err != nil {
		j.err = fmt.Errorf("join: label join %q: sink: %w", j.spec.Name, err)
		return j.err
	}
	var key, val []byte
	for id := range j.dirty {
		key = append(append(key[:0], 'e'), id...)
		h := j.held[id]
		if h == nil {
			if err := w.Delete(key); err != nil {
				return err
			}
			continue
		}
		val = append(val[:0], labelVersion1)
		val = binary.AppendVarint(val, h.t)
		val = binary.AppendVarint(val, h.due)
		val = appendFloats(val, h.vals)
		val = appendFloats(val, h.labels)
		val = binary.AppendUvarint(val, h.set)
		val = binary.AppendUvarint(val, uint64(len(h.at)))
		for _, t := range h.at {
			val = binary.AppendVarint(val, t)
		}
		if err := w.Set(key, val); err != nil {
			return err
		}
	}
	clear(j.dirty)
	if j.metaDirty {
		val = append(val[:0], labelVersion1)
		val = binary.AppendVarint(val, j.newest)
		for _, v := range []uint64{j.st.Rows, j.st.Attached, j.st.Unmatched, j.st.Duplicates} {
			val = binary.AppendUvarint(val, v)
		}
		if err := w.Set([]byte("m"), val); err != nil {
			return err
		}
		j.metaDirty = false
	}
	return nil
}

func (j *Labels[E]) load(k, v []byte) error {
	d := wire.Decoder{B: v}
	switch {
	case len(k) == 1 && k[0] == 'm':
		if err := checkVersion(&d, "label meta", labelVersion1); err != nil {
			return err
		}
		newest := d.Varint()
		var st LabelStats
		for _, p := range []*uint64{&st.Rows, &st.Attached, &st.Unmatched, &st.Duplicates} {
			*p = d.Uvarint()
		}
		if err := d.Finish(); err != nil {
			return fmt.Errorf("label meta: %w", err)
		}
		j.newest, j.st = newest, st
	case len(k) >= 1 && k[0] == 'e':
		if err := checkVersion(&d, "held event", labelVersion1); err != nil {
			return err
		}
		h := &heldEvent{id: string(k[1:]), t: d.Varint(), due: d.Varint()}
		h.vals = readFloats(&d)
		h.labels = readFloats(&d)
		h.set = d.Uvarint()
		n := d.Len()
		for range n {
			h.at = append(h.at, d.Varint())
		}
		if err := d.Finish(); err != nil {
			return fmt.Errorf("held event: %w", err)
		}
		if len(h.labels) != len(j.spec.Labels) || len(h.at) != len(h.labels) {
			return fmt.Errorf("held event has %d labels, the join defines %d", len(h.labels), len(j.spec.Labels))
		}
		j.hold(h)
		delete(j.dirty, h.id)
	default:
		return fmt.Errorf("unknown key %q", k)
	}
	return nil
}
