package tallyward

import (
	"encoding/binary"
	"errors"
	"fmt"

	"github.com/tallyward/tallyward/internal/wire"
)

// record is the stored state of one entity key: every feature of its
// entity, so an event costs one lookup per entity.
type record struct {
	// last is the newest event time applied to this record.
	last int64
	// aggs holds one aggregate per feature of the entity, in definition
	// order. Invariant: len(aggs) == len(entity.Features).
	aggs []Aggregate
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
	return appendRecord(dst, r.last, len(r.aggs), func(i int, dst []byte) ([]byte, error) { return r.aggs[i].AppendBinary(dst) })
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

// SizeBytes estimates r's heap footprint.
func (r *record) SizeBytes() int {
	n := 48 + 16*len(r.aggs)
	for _, a := range r.aggs {
		n += a.SizeBytes()
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
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != recordVersion1 {
		return nil, fmt.Errorf("%w: unknown version %d", errRecord, v)
	}
	r := &record{last: d.Varint(), aggs: fresh()}
	n := d.Uvarint()
	if d.Err == nil && n != uint64(len(r.aggs)) {
		return nil, fmt.Errorf("%w: holds %d features, definition has %d", errRecord, n, len(r.aggs))
	}
	for i := range r.aggs {
		blob := d.Bytes(d.Len())
		if d.Err != nil {
			break
		}
		if err := r.aggs[i].UnmarshalBinary(blob); err != nil {
			return nil, fmt.Errorf("%w: feature %d: %w", errRecord, i, err)
		}
	}
	if err := d.Finish(); err != nil {
		return nil, fmt.Errorf("%w: %w", errRecord, err)
	}
	return r, nil
}
