package join

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/google/btree"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// Timed is an event with its time.
type Timed[E any] struct {
	Time  int64
	Event E
}

// Match is an output of an interval join: one left event and right events
// of the same key whose times lie in [left + Lo, left + Hi].
type Match[E any] struct {
	// Seq is the match's position in the join's output, from 0; after a
	// crash, matches from the last commit on are emitted again with the
	// same Seq and content.
	Seq uint64
	Key string
	// Left is the left event; Values its row (valid only during Emit).
	Left   Timed[E]
	Values []float64
	// Rights: in the Settled variant every right event of the window, in
	// (time, encoding) order, possibly none; in the Eager variant exactly
	// one.
	Rights []Timed[E]
}

// IntervalSpec describes an interval join of two sides of one pipeline's
// events on a key.
type IntervalSpec[E any] struct {
	// Name keys the join's state in the store; [A-Za-z0-9_.-]. Required.
	Name string
	// Left and Right select the two sides (an event may be on both).
	// Required.
	Left, Right func(E) bool
	// Key returns the join key of an event of either side; "" joins
	// nothing. Required.
	Key func(E) string
	// Lo and Hi bound the right event's time relative to the left's:
	// right time in [left + Lo, left + Hi]; Lo <= Hi, either may be
	// negative. Default: 0 each.
	Lo, Hi time.Duration
	// Eager emits each pair (a Match with one right) as soon as both
	// events have been seen, instead of one Match per left event once the
	// watermark passes left + Hi. Default: false (Settled).
	Eager bool
	// Codec encodes the events the join holds. Default: JSON.
	Codec Codec[E]
	// Emit receives the output. Required.
	Emit func(Match[E])
}

// Validate reports every problem with s at once.
func (s *IntervalSpec[E]) Validate() error {
	var errs []error
	if !validName(s.Name) {
		errs = append(errs, fmt.Errorf("join: interval join name %q must be non-empty [A-Za-z0-9_.-]", s.Name))
	}
	if s.Left == nil || s.Right == nil || s.Key == nil || s.Emit == nil {
		errs = append(errs, fmt.Errorf("join: interval join %q: Left, Right, Key and Emit are required", s.Name))
	}
	if s.Lo > s.Hi {
		errs = append(errs, fmt.Errorf("join: interval join %q: Lo %v > Hi %v", s.Name, s.Lo, s.Hi))
	}
	if (s.Codec.Append == nil) != (s.Codec.Decode == nil) {
		errs = append(errs, fmt.Errorf("join: interval join %q: set both Codec functions or neither", s.Name))
	}
	return errors.Join(errs...)
}

// IntervalStats are an interval join's counters.
type IntervalStats struct {
	HeldLeft, HeldRight int    // events held for matching
	HeldBytes           int    // their approximate memory
	Matches             uint64 // Match values emitted (the next Seq)
	Pairs               uint64 // (left, right) pairs found
}

// Interval is a running interval join, fed by a pipeline's rows and
// watermark like Labels (use OpenInterval, or set Spec.Emit and
// Spec.OnWatermark to its methods and call Attach).
//
// A left event is held until the watermark passes left + Hi; a right
// event until it passes right − Lo (no left still to come can match it
// after that). Each pair is found once, by whichever of its events comes
// second. Settled: when a left is released, one Match with all its rights
// is emitted, in (left time, encoding) order; with a Settled pipeline the
// output depends only on the events, not their arrival order within
// MaxDisorder. Eager: each pair is emitted when found (lowest latency; the
// order follows arrival). Flush, the end of a finite replay, releases
// every left event, so the last ones carry the right events the history
// holds even where their window reaches past its end (unlike the label
// join, which holds what has not matured).
//
// Held events are encoded with Codec and kept in the pipeline's store
// under the join's name, written by each commit; a restart resumes from
// the last commit, re-emitting matches from it on with the same Seq.
//
// Concurrency: as the pipeline (Live serialises it).
type Interval[E any] struct {
	spec     IntervalSpec[E]
	codec    Codec[E]
	lo, hi   int64
	attached bool

	lefts  map[string][]*ivEvent[E]
	rights map[string][]*ivEvent[E]
	lexp   *btree.BTreeG[*ivEvent[E]] // by release time (t + Hi), encoding, ord
	rexp   *btree.BTreeG[*ivEvent[E]] // by release time (t − Lo), ord
	byOrd  map[uint64]*ivEvent[E]
	dirty  map[uint64]struct{}

	nextOrd   uint64
	metaDirty bool
	bytes     int
	st        IntervalStats
	out       Match[E]
	err       error
}

// ivEvent is a held event of one side.
type ivEvent[E any] struct {
	ord     uint64
	left    bool
	key     string
	t       int64
	release int64
	enc     []byte
	ev      E
	vals    []float64     // left only
	rights  []*ivEvent[E] // left only, Settled: rights found so far
}

func (e *ivEvent[E]) size() int {
	n := 128 + len(e.key) + len(e.enc) + 8*len(e.vals) + 8*len(e.rights)
	for _, r := range e.rights {
		n += 64 + len(r.enc)
	}
	return n
}

func ivLess[E any](a, b *ivEvent[E]) bool {
	if a.release != b.release {
		return a.release < b.release
	}
	if c := bytes.Compare(a.enc, b.enc); c != 0 {
		return c < 0
	}
	return a.ord < b.ord
}

// NewInterval validates spec and makes an interval join to be attached.
func NewInterval[E any](spec IntervalSpec[E]) (*Interval[E], error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	return &Interval[E]{spec: spec, codec: spec.Codec.orJSON(), lo: int64(spec.Lo), hi: int64(spec.Hi),
		lefts: map[string][]*ivEvent[E]{}, rights: map[string][]*ivEvent[E]{},
		lexp: btree.NewG(16, ivLess[E]), rexp: btree.NewG(16, ivLess[E]),
		byOrd: map[uint64]*ivEvent[E]{}, dirty: map[uint64]struct{}{}}, nil
}

// OpenInterval opens a pipeline whose rows feed a new interval join
// (chaining any Emit and OnWatermark already in spec) and attaches it.
func OpenInterval[E any](spec tallyward.Spec[E], opts tallyward.Options, is IntervalSpec[E]) (*tallyward.Pipeline[E], *Interval[E], error) {
	j, err := NewInterval(is)
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

// Attach loads the join's committed state from p's store and registers it
// with p's commits. Call it once, before any event.
func (j *Interval[E]) Attach(p *tallyward.Pipeline[E]) error {
	desc := fmt.Sprintf("interval v1 lo=%d hi=%d eager=%v", j.lo, j.hi, j.spec.Eager)
	if err := attachPart(p, "interval."+j.spec.Name, desc, intervalPart[E]{j}, j.load); err != nil {
		return err
	}
	j.attached = true
	return nil
}

// Err returns the sticky error that stopped the join.
func (j *Interval[E]) Err() error { return j.err }

// Stats returns the join's counters.
func (j *Interval[E]) Stats() IntervalStats {
	s := j.st
	s.HeldBytes = j.bytes
	s.HeldLeft, s.HeldRight = j.lexp.Len(), j.rexp.Len()
	return s
}

// Emit consumes one pipeline row; set it as (or call it from) Spec.Emit.
func (j *Interval[E]) Emit(r tallyward.Row[E]) {
	if j.err != nil {
		return
	}
	if !j.attached {
		j.err = ErrNotAttached
		return
	}
	key := j.spec.Key(r.Event)
	if key == "" {
		return
	}
	isL, isR := j.spec.Left(r.Event), j.spec.Right(r.Event)
	if !isL && !isR {
		return
	}
	enc, err := j.codec.Append(nil, r.Event)
	if err != nil {
		j.err = fmt.Errorf("join: interval join %q: encode: %w", j.spec.Name, err)
		return
	}
	j.metaDirty = true
	var self *ivEvent[E] // an event on both sides never pairs with itself
	if isL {
		l := &ivEvent[E]{left: true, key: key, t: r.Time, release: sat.Add(r.Time, j.hi), enc: enc, ev: r.Event, vals: slices.Clone(r.Values)}
		l.ord = j.nextOrd
		j.nextOrd++
		j.hold(l)
		self = l
		lo, hi := sat.Add(r.Time, j.lo), sat.Add(r.Time, j.hi)
		for _, rt := range j.rights[key] {
			if rt.t >= lo && rt.t <= hi {
				j.pair(l, rt)
			}
		}
	}
	if isR {
		rt := &ivEvent[E]{key: key, t: r.Time, release: sat.Sub(r.Time, j.lo), enc: enc, ev: r.Event}
		rt.ord = j.nextOrd
		j.nextOrd++
		lo, hi := sat.Sub(r.Time, j.hi), sat.Sub(r.Time, j.lo)
		for _, l := range j.lefts[key] {
			if l != self && l.t >= lo && l.t <= hi {
				j.pair(l, rt)
			}
		}
		j.hold(rt)
	}
}

func (j *Interval[E]) hold(e *ivEvent[E]) {
	if e.left {
		j.lefts[e.key] = append(j.lefts[e.key], e)
		j.lexp.ReplaceOrInsert(e)
	} else {
		j.rights[e.key] = append(j.rights[e.key], e)
		j.rexp.ReplaceOrInsert(e)
	}
	j.byOrd[e.ord] = e
	j.bytes += e.size()
	j.dirty[e.ord] = struct{}{}
}

func (j *Interval[E]) pair(l, r *ivEvent[E]) {
	j.st.Pairs++
	if j.spec.Eager {
		j.out = Match[E]{Seq: j.st.Matches, Key: l.key, Left: Timed[E]{l.t, l.ev}, Values: l.vals,
			Rights: append(j.out.Rights[:0], Timed[E]{r.t, r.ev})}
		j.st.Matches++
		j.spec.Emit(j.out)
		return
	}
	j.bytes -= l.size()
	l.rights = append(l.rights, r)
	j.bytes += l.size()
	j.dirty[l.ord] = struct{}{}
}

// OnWatermark releases what the watermark w has passed; set it as (or
// call it from) Spec.OnWatermark.
func (j *Interval[E]) OnWatermark(w int64) {
	if j.err != nil || !j.attached {
		return
	}
	for {
		l, ok := j.lexp.Min()
		if !ok || l.release >= w {
			break
		}
		j.lexp.DeleteMin()
		if !j.spec.Eager {
			slices.SortFunc(l.rights, func(a, b *ivEvent[E]) int {
				if a.t != b.t {
					if a.t < b.t {
						return -1
					}
					return 1
				}
				return bytes.Compare(a.enc, b.enc)
			})
			j.out = Match[E]{Seq: j.st.Matches, Key: l.key, Left: Timed[E]{l.t, l.ev}, Values: l.vals, Rights: j.out.Rights[:0]}
			for _, r := range l.rights {
				j.out.Rights = append(j.out.Rights, Timed[E]{r.t, r.ev})
			}
			j.st.Matches++
			j.metaDirty = true
			j.spec.Emit(j.out)
		}
		j.drop(l, j.lefts)
	}
	for {
		r, ok := j.rexp.Min()
		if !ok || r.release >= w {
			break
		}
		j.rexp.DeleteMin()
		j.drop(r, j.rights)
	}
}

func (j *Interval[E]) drop(e *ivEvent[E], idx map[string][]*ivEvent[E]) {
	list := idx[e.key]
	if i := slices.Index(list, e); i >= 0 {
		list = slices.Delete(list, i, i+1)
	}
	if len(list) == 0 {
		delete(idx, e.key)
	} else {
		idx[e.key] = list
	}
	delete(j.byOrd, e.ord)
	j.bytes -= e.size()
	j.dirty[e.ord] = struct{}{}
}

// Stored layout under part "interval.<name>" (tag 0x06, see
// internal/store):
//
//	"d"        -> the join's definition as text (see attachPart)
//	"m"                    -> byte version (1) | uvarint next ord |
//	                          uvarint matches | uvarint pairs
//	"e" | 8-byte BE ord    -> byte version (1) | byte side (1 left,
//	                          2 right) | bytes key | varint time |
//	                          bytes event | left only: floats row |
//	                          uvarint n, n times (varint time, bytes event)
//
// bytes: uvarint length then the bytes; floats as in the label join.
const intervalVersion1 = 1

// The join as a store.Part, kept off the public method set.
type intervalPart[E any] struct{ j *Interval[E] }

func (p intervalPart[E]) Stage(w *store.PartWriter) error { return p.j.stage(w) }

// stage writes what changed since the last commit.
func (j *Interval[E]) stage(w *store.PartWriter) error {
	if j.err != nil {
		return j.err
	}
	var key, val []byte
	for ord := range j.dirty {
		key = binary.BigEndian.AppendUint64(append(key[:0], 'e'), ord)
		e := j.byOrd[ord]
		if e == nil {
			if err := w.Delete(key); err != nil {
				return err
			}
			continue
		}
		side := byte(2)
		if e.left {
			side = 1
		}
		val = append(val[:0], intervalVersion1, side)
		val = appendBytes(val, []byte(e.key))
		val = binary.AppendVarint(val, e.t)
		val = appendBytes(val, e.enc)
		if e.left {
			val = appendFloats(val, e.vals)
			val = binary.AppendUvarint(val, uint64(len(e.rights)))
			for _, r := range e.rights {
				val = binary.AppendVarint(val, r.t)
				val = appendBytes(val, r.enc)
			}
		}
		if err := w.Set(key, val); err != nil {
			return err
		}
	}
	clear(j.dirty)
	if j.metaDirty {
		val = append(val[:0], intervalVersion1)
		val = binary.AppendUvarint(val, j.nextOrd)
		val = binary.AppendUvarint(val, j.st.Matches)
		val = binary.AppendUvarint(val, j.st.Pairs)
		if err := w.Set([]byte("m"), val); err != nil {
			return err
		}
		j.metaDirty = false
	}
	return nil
}

func (j *Interval[E]) load(k, v []byte) error {
	d := wire.Decoder{B: v}
	if err := checkVersion(&d, "interval state", intervalVersion1); err != nil {
		return err
	}
	switch {
	case len(k) == 1 && k[0] == 'm':
		next, matches, pairs := d.Uvarint(), d.Uvarint(), d.Uvarint()
		if err := d.Finish(); err != nil {
			return fmt.Errorf("interval meta: %w", err)
		}
		j.nextOrd, j.st.Matches, j.st.Pairs = next, matches, pairs
		return nil
	case len(k) == 9 && k[0] == 'e':
	default:
		return fmt.Errorf("unknown key %q", k)
	}
	e := &ivEvent[E]{ord: binary.BigEndian.Uint64(k[1:])}
	side := d.Byte()
	e.left = side == 1
	e.key = string(readBytes(&d))
	e.t = d.Varint()
	e.enc = bytes.Clone(readBytes(&d))
	if e.left {
		e.vals = readFloats(&d)
		n := d.Len()
		for i := 0; i < n && d.Err == nil; i++ {
			r := &ivEvent[E]{t: d.Varint(), enc: bytes.Clone(readBytes(&d))}
			e.rights = append(e.rights, r)
		}
	}
	if err := d.Finish(); err != nil {
		return fmt.Errorf("held event: %w", err)
	}
	if side != 1 && side != 2 {
		return fmt.Errorf("held event: side %d", side)
	}
	var err error
	if e.ev, err = j.codec.Decode(e.enc); err != nil {
		return fmt.Errorf("held event: %w", err)
	}
	for _, r := range e.rights {
		if r.ev, err = j.codec.Decode(r.enc); err != nil {
			return fmt.Errorf("held event: %w", err)
		}
	}
	if e.left {
		e.release = sat.Add(e.t, j.hi)
	} else {
		e.release = sat.Sub(e.t, j.lo)
	}
	j.hold(e)
	delete(j.dirty, e.ord)
	return nil
}

// Forget drops every event the join holds for key (say, with
// Pipeline.Erase of the entity the key names: call Forget first, so the
// commit Erase makes removes both). Matches not yet emitted for the key
// are dropped, not emitted. Later events naming the key are joined again;
// a caller that must keep the key out filters them before the pipeline.
func (j *Interval[E]) Forget(key string) {
	for _, idx := range []map[string][]*ivEvent[E]{j.lefts, j.rights} {
		for _, e := range slices.Clone(idx[key]) {
			if e.left {
				j.lexp.Delete(e)
			} else {
				j.rexp.Delete(e)
			}
			j.drop(e, idx)
		}
	}
	// Rights of other keys never hold this key's events: pairs are
	// formed within one key only.
}
