package tallyward

import (
	"encoding/binary"
	"errors"
	"fmt"
	"reflect"
	"slices"
	"strconv"
	"sync"
	"time"
	"unsafe"

	"github.com/tallyward/tallyward/internal/prefetch"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// record is the stored state of one entity key: every feature of its
// entity, so an event costs one lookup per entity.
//
// Memory. A record made by a recordLayout is one heap object: this
// header and every built-in aggregate by value (window
// and sketch types built in place with their Init, their first panes,
// raw events and items stored inside them). A sparse entity therefore
// costs one allocation and the collector scans one object; only an
// aggregate that outgrows its inline storage, or a user kind (built by
// Kind.NewAggregate), holds objects of its own. A record built from bare
// aggregates (bareRecord) has a layout that places none.
//
// A placed aggregate is reached through the layout (agg), from its
// offset: an interface per feature in every record would cost 16 bytes
// each, a cache line of a six-feature account record, and the header
// is two words so that a one-feature device record fits 128 bytes.
type record struct {
	// last is the newest event time applied to this record.
	last int64
	lay  *recordLayout // how the record was made; never nil
}

// features returns how many features r holds.
func (r *record) features() int { return len(r.lay.fields) }

// agg returns r's aggregate of feature i.
func (r *record) agg(i int) Aggregate {
	f := &r.lay.fields[i]
	p := unsafe.Add(unsafe.Pointer(r), f.off)
	if f.placed {
		return f.pl.as(p)
	}
	return *(*Aggregate)(p)
}

// bareRecord returns a record holding aggs as they are (objects of their
// own), as a record decoded for a test or a tool is.
func bareRecord(aggs []Aggregate) *record {
	l, ok := bareLayouts.Load(len(aggs))
	if !ok {
		l, _ = bareLayouts.LoadOrStore(len(aggs), newRecordLayout(make([]Kind, len(aggs)), 0))
	}
	r := (*record)(reflect.New(l.(*recordLayout).typ).UnsafePointer())
	r.lay = l.(*recordLayout)
	for i, a := range aggs {
		*(*Aggregate)(unsafe.Add(unsafe.Pointer(r), r.lay.fields[i].off)) = a
	}
	return r
}

// bareLayouts holds the layouts of bare records by feature count.
var bareLayouts sync.Map

// aggs returns r's aggregates, appended to dst.
func (r *record) aggs(dst []Aggregate) []Aggregate {
	for i := range r.features() {
		dst = append(dst, r.agg(i))
	}
	return dst
}

// placedKind is implemented by built-in kinds whose aggregate can live by
// value inside a record's one object. It is unexported: a user kind goes
// through NewAggregate, as every kind did before.
type placedKind interface {
	Kind
	placement(horizon time.Duration) placement
}

// placement says how to build one kind's aggregate in place.
type placement struct {
	typ  reflect.Type                     // the aggregate's value type; *typ implements Aggregate
	init func(p unsafe.Pointer) Aggregate // makes *p an empty aggregate, whatever it held
	as   func(p unsafe.Pointer) Aggregate // the aggregate at p
	self int                              // bytes of the value that its SizeBytes counts as its own
	// hint brings what the value at p keeps outside itself into the
	// processor's caches (see memoryHinter); nil if nothing.
	hint func(p unsafe.Pointer)
}

// memoryHinter is a placed aggregate that keeps storage outside its value
// (panes, raw events, exact entries) and can have it brought into the
// processor's caches ahead of use.
type memoryHinter interface{ HintMemory() }

// placeAs is the placement of adapter type T, which embeds a window or
// sketch value as its first field and is built by init.
func placeAs[T any, PT interface {
	*T
	Aggregate
}](init func(*T) error) placement {
	typ := reflect.TypeFor[T]()
	pl := placement{typ: typ, self: int(typ.Field(0).Type.Size()), init: func(p unsafe.Pointer) Aggregate {
		x := (*T)(p)
		if err := init(x); err != nil {
			panic(err) // unreachable: Open validates every kind with its horizon first
		}
		return PT(x)
	}, as: func(p unsafe.Pointer) Aggregate { return PT((*T)(p)) }}
	if _, ok := any(PT(nil)).(memoryHinter); ok {
		pl.hint = func(p unsafe.Pointer) { any(PT((*T)(p))).(memoryHinter).HintMemory() }
	}
	return pl
}

// newPlaced builds a placed aggregate on its own, for NewAggregate.
func newPlaced(pl placement) Aggregate { return pl.init(reflect.New(pl.typ).UnsafePointer()) }

// recordLayout lays out the records of one entity: a struct type made at
// Open, struct{ R record; F0 T0; F1 T1; ... }, with one field per feature:
// the aggregate itself for a placed kind, an Aggregate (interface) for
// one that is not (a user kind's aggregate is an object of its own).
type recordLayout struct {
	kinds   []Kind
	horizon time.Duration
	typ     reflect.Type
	fields  []layoutField // per feature
	// size is what one record object costs on the heap (its size class).
	size int
	// hints are the placed fields that keep storage outside the record.
	hints []layoutField
}

type layoutField struct {
	placed bool
	off    uintptr // the field's offset in the record
	pl     placement
}

// newRecordLayout lays out records for kinds under horizon.
func newRecordLayout(kinds []Kind, horizon time.Duration) *recordLayout {
	l := &recordLayout{kinds: kinds, horizon: horizon, fields: make([]layoutField, len(kinds))}
	sf := []reflect.StructField{
		{Name: "R", Type: reflect.TypeFor[record]()},
	}
	for i, k := range kinds {
		typ := reflect.TypeFor[Aggregate]()
		if pk, ok := k.(placedKind); ok {
			l.fields[i] = layoutField{placed: true, pl: pk.placement(horizon)}
			typ = l.fields[i].pl.typ
		}
		sf = append(sf, reflect.StructField{Name: "F" + strconv.Itoa(i), Type: typ})
	}
	l.typ = reflect.StructOf(sf)
	for i := range l.fields {
		l.fields[i].off = l.typ.Field(i + 1).Offset
	}
	for _, f := range l.fields {
		if f.placed && f.pl.hint != nil {
			l.hints = append(l.hints, f)
		}
	}
	// Go rounds an allocation up to a size class; growing an empty slice
	// to n bytes lands on the class of n.
	l.size = cap(slices.Grow([]byte(nil), int(l.typ.Size())))
	return l
}

// hint starts bringing r's memory into the processor's caches without
// reading it (package prefetch): its one object, as laid out by l.
func (l *recordLayout) hint(r *record) { prefetch.Range(unsafe.Pointer(r), l.size) }

// hintOutside starts bringing what r's aggregates keep outside r into
// the processor's caches. It reads r, so it pays off once hint has
// brought r in.
func (l *recordLayout) hintOutside(r *record) {
	for i := range l.hints {
		l.hints[i].pl.hint(unsafe.Add(unsafe.Pointer(r), l.hints[i].off))
	}
}

// newRecord returns an empty record with newest time last: one
// allocation, plus one per feature of a kind that is not placed.
func (l *recordLayout) newRecord(last int64) *record {
	base := reflect.New(l.typ).UnsafePointer()
	r := (*record)(base)
	r.last, r.lay = last, l
	l.empty(r)
	return r
}

// recordFor returns a new, empty record at last for tb: the record of an
// entity a commit removed as expired if tb kept one (the same layout:
// tables hold one entity's records), else a new one.
func (l *recordLayout) recordFor(tb *store.Table[*record], last int64) *record {
	r, ok := tb.Reuse()
	if !ok {
		return l.newRecord(last)
	}
	l.empty(r)
	r.last = last
	return r
}

// empty makes every aggregate of r empty in place (placed ones reuse
// their memory; others are made anew). last is kept.
func (l *recordLayout) empty(r *record) {
	base := unsafe.Pointer(r)
	for i := range l.fields {
		if f := &l.fields[i]; f.placed {
			f.pl.init(unsafe.Add(base, f.off))
		} else {
			*(*Aggregate)(unsafe.Add(base, f.off)) = l.kinds[i].NewAggregate(l.horizon)
		}
	}
}

// reset empties an expired record in place, keeping its newest time: it
// then reads as a new entity, without a new allocation for its placed
// aggregates (their grown storage is released). r must not be bare.
func (r *record) reset() { r.lay.empty(r) }

// fresh returns empty aggregates of a new record.
func (l *recordLayout) fresh() []Aggregate { return l.newRecord(0).aggs(nil) }

// decode decodes a stored record into a new one (see decodeRecord).
func (l *recordLayout) decode(b []byte) (*record, error) {
	r := l.newRecord(0)
	if err := r.decode(b); err != nil {
		return nil, err
	}
	return r, nil
}

const recordVersion1 = 1

// errRecord is wrapped by every record decoding error.
var errRecord = errors.New("entity record")

// AppendBinary encodes r:
//
//	byte     version (1)
//	varint   last event time applied
//	uvarint  number of features n
//	n times: uvarint length, then that many bytes of the feature's own
//	         versioned encoding (package window or sketch)
func (r *record) AppendBinary(dst []byte) ([]byte, error) {
	return appendRecord(dst, r.last, r.features(), func(i int, dst []byte) ([]byte, error) { return r.agg(i).AppendBinary(dst) })
}

// appendRecord writes the record layout of AppendBinary with n features,
// the i-th encoded by feature(i, dst).
func appendRecord(dst []byte, last int64, n int, feature func(i int, dst []byte) ([]byte, error)) ([]byte, error) {
	dst = append(dst, recordVersion1)
	dst = binary.AppendVarint(dst, last)
	dst = binary.AppendUvarint(dst, uint64(n))
	for i := range n {
		var err error
		if dst, err = wire.AppendFramed(dst, func(dst []byte) ([]byte, error) { return feature(i, dst) }); err != nil {
			return dst, err
		}
	}
	return dst, nil
}

// LastTime returns the newest event time applied (store.Value).
func (r *record) LastTime() int64 { return r.last }

// SizeBytes estimates r's heap footprint: its object rounded up to Go's
// size class, what its aggregates hold outside it, and each aggregate
// that is an object of its own.
func (r *record) SizeBytes() int {
	n := r.lay.size
	for i := range r.lay.fields {
		n += r.agg(i).SizeBytes()
		if f := &r.lay.fields[i]; f.placed {
			n -= f.pl.self
		}
	}
	return n
}

// peekLast reads a record's last event time without decoding its
// features.
func peekLast(b []byte) (int64, error) {
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != recordVersion1 {
		return 0, fmt.Errorf("%w: unknown version %d", errRecord, v)
	}
	last := d.Varint()
	if d.Err != nil {
		return 0, fmt.Errorf("%w: %w", errRecord, d.Err)
	}
	return last, nil
}

// decodeRecord decodes b into fresh aggregates made by fresh. It returns an
// error, never panics, on any malformed input. Layout, version 1 (as
// written by record.AppendBinary; docs/formats.md lists every layout):
//
//	byte     version (1)
//	varint   last event time applied
//	uvarint  number of features n (must equal the definition's)
//	n times: uvarint length, then that many bytes of the feature's own
//	         versioned encoding
//	then end of input
func decodeRecord(b []byte, fresh func() []Aggregate) (*record, error) {
	r := bareRecord(fresh())
	if err := r.decode(b); err != nil {
		return nil, err
	}
	return r, nil
}

// decode replaces r's state with the record b (layout on decodeRecord).
// On error r is left part decoded: callers drop it.
func (r *record) decode(b []byte) error {
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != recordVersion1 {
		return fmt.Errorf("%w: unknown version %d", errRecord, v)
	}
	r.last = d.Varint()
	n := d.Uvarint()
	if d.Err == nil && n != uint64(r.features()) {
		return fmt.Errorf("%w: holds %d features, definition has %d", errRecord, n, r.features())
	}
	for i := range r.features() {
		blob := d.Bytes(d.Len())
		if d.Err != nil {
			break
		}
		if err := r.agg(i).UnmarshalBinary(blob); err != nil {
			return fmt.Errorf("%w: feature %d: %w", errRecord, i, err)
		}
	}
	if err := d.Finish(); err != nil {
		return fmt.Errorf("%w: %w", errRecord, err)
	}
	return nil
}
