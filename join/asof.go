package join

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/google/btree"
	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// Attached is an output of an as-of join: a left event with the latest
// right-side value of its key at or before its time.
type Attached[E any] struct {
	// Seq is the output position, from 0 (re-emitted with the same Seq
	// after a crash, as for the other joins).
	Seq  uint64
	Key  string
	Left Timed[E]
	// Values is the left event's row (valid only during Emit).
	Values []float64
	// Value is the right value attached and At its time; Found is false
	// (Value NaN, At 0) when the key had no right value at or before the
	// left's time.
	Value float64
	At    int64
	Found bool
}

// AsOfSpec describes an as-of join.
type AsOfSpec[E any] struct {
	// Name keys the join's state in the store; [A-Za-z0-9_.-]. Required.
	Name string
	// Left and Right select the two sides. Required.
	Left, Right func(E) bool
	// Key returns the join key of an event of either side; "" joins
	// nothing. Required.
	Key func(E) string
	// Value is the number a right event sets for its key (a verification
	// level, a limit). Required.
	Value func(E) float64
	// Eager answers each left event at its row, over the right events
	// seen so far (for an Eager pipeline: the result then follows arrival
	// order). Default: false: each left waits until the watermark passes
	// its time, so every right at or before it has been seen.
	Eager bool
	// TTL forgets a key whose newest right value is this far behind the
	// watermark. Default: 0, never (a value set long ago still holds).
	TTL time.Duration
	// Codec encodes left events that wait for the watermark across a
	// commit (only with an Eager pipeline). Default: JSON.
	Codec Codec[E]
	// Emit receives the output. Required.
	Emit func(Attached[E])
}

// Validate reports every problem with s at once.
func (s *AsOfSpec[E]) Validate() error {
	var errs []error
	if !validName(s.Name) {
		errs = append(errs, fmt.Errorf("join: as-of join name %q must be non-empty [A-Za-z0-9_.-]", s.Name))
	}
	if s.Left == nil || s.Right == nil || s.Key == nil || s.Value == nil || s.Emit == nil {
		errs = append(errs, fmt.Errorf("join: as-of join %q: Left, Right, Key, Value and Emit are required", s.Name))
	}
	if s.TTL < 0 {
		errs = append(errs, fmt.Errorf("join: as-of join %q: TTL %v < 0", s.Name, s.TTL))
	}
	if (s.Codec.Append == nil) != (s.Codec.Decode == nil) {
		errs = append(errs, fmt.Errorf("join: as-of join %q: set both Codec functions or neither", s.Name))
	}
	return errors.Join(errs...)
}

// AsOfStats are an as-of join's counters.
type AsOfStats struct {
	Keys      int    // keys with right values
	Points    int    // right values kept
	Waiting   int    // left events waiting for the watermark
	HeldBytes int    // approximate memory of the above
	Emitted   uint64 // outputs (the next Seq)
	Found     uint64 // outputs with a right value
}

// AsOf is a running as-of join, fed by a pipeline's rows and watermark
// like Labels (use OpenAsOf, or set Spec.Emit and Spec.OnWatermark to its
// methods and call Attach).
//
// The value attached to a left event at time l is the one of the right
// event of its key with the greatest time <= l; of several at that time,
// the greatest value, so the answer does not depend on the order of
// equal-time events. Per key the join keeps the right values newer than
// the watermark and the newest one at or below it (no later left can ask
// for anything older), so state is one value per key plus the disorder
// window. With a Settled pipeline and Eager false, the output depends
// only on the events, not their arrival order within MaxDisorder; outputs
// come in the order of the left rows.
//
// Concurrency: as the pipeline (Live serialises it).
type AsOf[E any] struct {
	spec     AsOfSpec[E]
	codec    Codec[E]
	attached bool
	wm       int64 // the watermark at the last OnWatermark

	keys    map[string]*asofKey
	expiry  *btree.BTreeG[*asofKey] // by (newest, key), only with a TTL
	waiting *btree.BTreeG[*asofLeft[E]]
	dirtyK  map[string]struct{}
	dirtyQ  map[uint64]struct{}
	byOrd   map[uint64]*asofLeft[E]
	nextOrd uint64

	metaDirty bool
	bytes     int
	st        AsOfStats
	out       Attached[E]
	err       error
}

type asofPoint struct {
	t int64
	v float64
}

type asofKey struct {
	key    string
	points []asofPoint // sorted by (t, v)
}

func (k *asofKey) newest() int64 { return k.points[len(k.points)-1].t }
func (k *asofKey) size() int     { return 64 + len(k.key) + 16*cap(k.points) }

type asofLeft[E any] struct {
	ord  uint64
	key  string
	t    int64
	ev   E
	vals []float64
}

func (l *asofLeft[E]) size() int { return 96 + len(l.key) + 8*len(l.vals) }

// NewAsOf validates spec and makes an as-of join to be attached.
func NewAsOf[E any](spec AsOfSpec[E]) (*AsOf[E], error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	return &AsOf[E]{spec: spec, codec: spec.Codec.orJSON(), wm: math.MinInt64, keys: map[string]*asofKey{},
		expiry: btree.NewG(16, func(a, b *asofKey) bool {
			if a.newest() != b.newest() {
				return a.newest() < b.newest()
			}
			return a.key < b.key
		}),
		waiting: btree.NewG(16, func(a, b *asofLeft[E]) bool { return a.ord < b.ord }),
		dirtyK:  map[string]struct{}{}, dirtyQ: map[uint64]struct{}{}, byOrd: map[uint64]*asofLeft[E]{}}, nil
}

// OpenAsOf opens a pipeline whose rows feed a new as-of join (chaining
// any Emit and OnWatermark already in spec) and attaches it.
func OpenAsOf[E any](spec tallyward.Spec[E], opts tallyward.Options, as AsOfSpec[E]) (*tallyward.Pipeline[E], *AsOf[E], error) {
	j, err := NewAsOf(as)
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
func (j *AsOf[E]) Attach(p *tallyward.Pipeline[E]) error {
	desc := fmt.Sprintf("asof v1 ttl=%d eager=%v", int64(j.spec.TTL), j.spec.Eager)
	if err := attachPart(p, "asof."+j.spec.Name, desc, asofPart[E]{j}, j.load); err != nil {
		return err
	}
	j.attached = true
	return nil
}

// Err returns the sticky error that stopped the join.
func (j *AsOf[E]) Err() error { return j.err }

// Stats returns the join's counters.
func (j *AsOf[E]) Stats() AsOfStats {
	s := j.st
	s.Keys, s.Waiting, s.HeldBytes = len(j.keys), j.waiting.Len(), j.bytes
	for _, k := range j.keys {
		s.Points += len(k.points)
	}
	return s
}

// Emit consumes one pipeline row; set it as (or call it from) Spec.Emit.
func (j *AsOf[E]) Emit(r tallyward.Row[E]) {
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
	// A right at the left's own time counts, so the right side goes first.
	if j.spec.Right(r.Event) {
		j.addPoint(key, asofPoint{r.Time, j.spec.Value(r.Event)})
	}
	if !j.spec.Left(r.Event) {
		return
	}
	l := &asofLeft[E]{ord: j.nextOrd, key: key, t: r.Time, ev: r.Event, vals: r.Values}
	j.nextOrd++
	j.metaDirty = true
	if j.spec.Eager {
		j.answer(l)
		return
	}
	l.vals = slices.Clone(r.Values)
	j.waiting.ReplaceOrInsert(l)
	j.byOrd[l.ord] = l
	j.bytes += l.size()
	j.dirtyQ[l.ord] = struct{}{}
}

func (j *AsOf[E]) addPoint(key string, p asofPoint) {
	k := j.keys[key]
	if k == nil {
		k = &asofKey{key: key}
		j.keys[key] = k
	} else {
		j.bytes -= k.size()
		if j.spec.TTL > 0 {
			j.expiry.Delete(k)
		}
	}
	i, _ := slices.BinarySearchFunc(k.points, p, cmpPoint)
	k.points = slices.Insert(k.points, i, p)
	// Keep the newest point at or below the watermark and everything
	// newer: a left still to come has a time >= the watermark.
	if n := j.lastAtOrBelow(k, j.wm); n > 0 {
		k.points = slices.Delete(k.points, 0, n)
	}
	j.bytes += k.size()
	if j.spec.TTL > 0 {
		j.expiry.ReplaceOrInsert(k)
	}
	j.dirtyK[key] = struct{}{}
}

// lastAtOrBelow returns the index of the last point with time <= t, or 0.
func (j *AsOf[E]) lastAtOrBelow(k *asofKey, t int64) int {
	i, _ := slices.BinarySearchFunc(k.points, asofPoint{t: t, v: math.Inf(1)}, cmpPoint)
	return max(i-1, 0)
}

func cmpPoint(a, b asofPoint) int {
	switch {
	case a.t != b.t:
		if a.t < b.t {
			return -1
		}
		return 1
	case a.v < b.v:
		return -1
	case a.v > b.v:
		return 1
	}
	return 0
}

func (j *AsOf[E]) answer(l *asofLeft[E]) {
	j.out = Attached[E]{Seq: j.st.Emitted, Key: l.key, Left: Timed[E]{l.t, l.ev}, Values: l.vals, Value: math.NaN()}
	if k := j.keys[l.key]; k != nil {
		i, _ := slices.BinarySearchFunc(k.points, asofPoint{t: l.t, v: math.Inf(1)}, cmpPoint)
		if i > 0 {
			p := k.points[i-1]
			j.out.Value, j.out.At, j.out.Found = p.v, p.t, true
			j.st.Found++
		}
	}
	j.st.Emitted++
	j.metaDirty = true
	j.spec.Emit(j.out)
}

// OnWatermark answers the left events the watermark w has passed and
// forgets what no later left can ask for; set it as (or call it from)
// Spec.OnWatermark.
func (j *AsOf[E]) OnWatermark(w int64) {
	if j.err != nil || !j.attached {
		return
	}
	var keep []*asofLeft[E]
	for l := range j.waiting.Ascend {
		if l.t < w {
			j.answer(l)
			delete(j.byOrd, l.ord)
			j.bytes -= l.size()
			j.dirtyQ[l.ord] = struct{}{}
		} else {
			keep = append(keep, l)
		}
	}
	if len(keep) != j.waiting.Len() {
		j.waiting.Clear(false)
		for _, l := range keep {
			j.waiting.ReplaceOrInsert(l)
		}
	}
	if w == math.MaxInt64 {
		return // the end of a finite replay: keep the values
	}
	j.wm = w
	j.metaDirty = true
	if j.spec.TTL <= 0 {
		return
	}
	for {
		k, ok := j.expiry.Min()
		if !ok || sat.Add(k.newest(), int64(j.spec.TTL)) > w {
			return
		}
		j.expiry.DeleteMin()
		delete(j.keys, k.key)
		j.bytes -= k.size()
		j.dirtyK[k.key] = struct{}{}
	}
}

// Stored layout under part "asof.<name>" (tag 0x06, see internal/store):
//
//	"d"        -> the join's definition as text (see attachPart)
//	"m"                   -> byte version (1) | varint watermark |
//	                         uvarint next ord | uvarint emitted | uvarint found
//	"k" | key             -> byte version (1) | uvarint n |
//	                         n times (varint time, 8-byte float bits)
//	"q" | 8-byte BE ord   -> byte version (1) | bytes key | varint time |
//	                         bytes event | floats row
const asofVersion1 = 1

// The join as a store.Part, kept off the public method set.
type asofPart[E any] struct{ j *AsOf[E] }

func (p asofPart[E]) Stage(w *store.PartWriter) error { return p.j.stage(w) }

// stage writes what changed since the last commit.
func (j *AsOf[E]) stage(w *store.PartWriter) error {
	if j.err != nil {
		return j.err
	}
	var key, val []byte
	for name := range j.dirtyK {
		key = append(append(key[:0], 'k'), name...)
		k := j.keys[name]
		if k == nil {
			if err := w.Delete(key); err != nil {
				return err
			}
			continue
		}
		val = append(val[:0], asofVersion1)
		val = binary.AppendUvarint(val, uint64(len(k.points)))
		for _, p := range k.points {
			val = binary.AppendVarint(val, p.t)
			val = binary.LittleEndian.AppendUint64(val, math.Float64bits(p.v))
		}
		if err := w.Set(key, val); err != nil {
			return err
		}
	}
	clear(j.dirtyK)
	for ord := range j.dirtyQ {
		key = binary.BigEndian.AppendUint64(append(key[:0], 'q'), ord)
		l := j.byOrd[ord]
		if l == nil {
			if err := w.Delete(key); err != nil {
				return err
			}
			continue
		}
		enc, err := j.codec.Append(nil, l.ev)
		if err != nil {
			return fmt.Errorf("join: as-of join %q: encode: %w", j.spec.Name, err)
		}
		val = append(val[:0], asofVersion1)
		val = appendBytes(val, []byte(l.key))
		val = binary.AppendVarint(val, l.t)
		val = appendBytes(val, enc)
		val = appendFloats(val, l.vals)
		if err := w.Set(key, val); err != nil {
			return err
		}
	}
	clear(j.dirtyQ)
	if j.metaDirty {
		val = append(val[:0], asofVersion1)
		val = binary.AppendVarint(val, j.wm)
		for _, v := range []uint64{j.nextOrd, j.st.Emitted, j.st.Found} {
			val = binary.AppendUvarint(val, v)
		}
		if err := w.Set([]byte("m"), val); err != nil {
			return err
		}
		j.metaDirty = false
	}
	return nil
}

func (j *AsOf[E]) load(k, v []byte) error {
	d := wire.Decoder{B: v}
	if err := checkVersion(&d, "as-of state", asofVersion1); err != nil {
		return err
	}
	switch {
	case len(k) == 1 && k[0] == 'm':
		wm, next, emitted, found := d.Varint(), d.Uvarint(), d.Uvarint(), d.Uvarint()
		if err := d.Finish(); err != nil {
			return fmt.Errorf("as-of meta: %w", err)
		}
		j.wm, j.nextOrd, j.st.Emitted, j.st.Found = wm, next, emitted, found
	case len(k) >= 1 && k[0] == 'k':
		ak := &asofKey{key: string(k[1:])}
		n := d.Len()
		for i := 0; i < n && d.Err == nil; i++ {
			t := d.Varint()
			b := d.Bytes(8)
			if d.Err == nil {
				ak.points = append(ak.points, asofPoint{t, math.Float64frombits(binary.LittleEndian.Uint64(b))})
			}
		}
		if err := d.Finish(); err != nil {
			return fmt.Errorf("as-of key: %w", err)
		}
		if len(ak.points) == 0 {
			return errors.New("as-of key: no values")
		}
		j.keys[ak.key] = ak
		j.bytes += ak.size()
		if j.spec.TTL > 0 {
			j.expiry.ReplaceOrInsert(ak)
		}
	case len(k) == 9 && k[0] == 'q':
		l := &asofLeft[E]{ord: binary.BigEndian.Uint64(k[1:])}
		l.key = string(readBytes(&d))
		l.t = d.Varint()
		enc := readBytes(&d)
		l.vals = readFloats(&d)
		if err := d.Finish(); err != nil {
			return fmt.Errorf("as-of waiting event: %w", err)
		}
		var err error
		if l.ev, err = j.codec.Decode(enc); err != nil {
			return fmt.Errorf("as-of waiting event: %w", err)
		}
		j.waiting.ReplaceOrInsert(l)
		j.byOrd[l.ord] = l
		j.bytes += l.size()
	default:
		return fmt.Errorf("unknown key %q", k)
	}
	return nil
}

// Forget drops the values and waiting left events the join holds for key
// (say, with Pipeline.Erase of the entity the key names: call Forget
// first, so the commit Erase makes removes both). Waiting left events of
// the key are dropped, not answered. Later events naming the key are
// joined again; a caller that must keep the key out filters them before
// the pipeline.
func (j *AsOf[E]) Forget(key string) {
	if k := j.keys[key]; k != nil {
		if j.spec.TTL > 0 {
			j.expiry.Delete(k)
		}
		delete(j.keys, key)
		j.bytes -= k.size()
		j.dirtyK[key] = struct{}{}
	}
	var drop []*asofLeft[E]
	for l := range j.waiting.Ascend {
		if l.key == key {
			drop = append(drop, l)
		}
	}
	for _, l := range drop {
		j.waiting.Delete(l)
		delete(j.byOrd, l.ord)
		j.bytes -= l.size()
		j.dirtyQ[l.ord] = struct{}{}
	}
}
