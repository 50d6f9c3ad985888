package store

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"testing"

	"github.com/cockroachdb/pebble/v2"
	"github.com/tallyward/tallyward/internal/wire"
)

// tv is the test record: a counter with the newest event time applied and
// some padding that makes its size vary.
//
// Encoding:
//
//	byte     version (1)
//	varint   Last
//	uvarint  N
//	uvarint  len(Pad), Pad bytes
type tv struct {
	Last int64
	N    uint64
	Pad  []byte

	failEncode bool // AppendBinary fails: provokes a failed write
}

var errEncode = errors.New("test: encode refused")

func (v *tv) AppendBinary(dst []byte) ([]byte, error) {
	if v.failEncode {
		return dst, errEncode
	}
	dst = append(dst, 1)
	dst = binary.AppendVarint(dst, v.Last)
	dst = binary.AppendUvarint(dst, v.N)
	dst = binary.AppendUvarint(dst, uint64(len(v.Pad)))
	return append(dst, v.Pad...), nil
}

func (v *tv) SizeBytes() int  { return 40 + len(v.Pad) }
func (v *tv) LastTime() int64 { return v.Last }

func decodeTV(b []byte) (*tv, error) {
	d := wire.Decoder{B: b}
	if ver := d.Byte(); d.Err == nil && ver != 1 {
		return nil, fmt.Errorf("tv version %d", ver)
	}
	v := &tv{Last: d.Varint(), N: d.Uvarint()}
	v.Pad = bytes.Clone(d.Bytes(d.Len()))
	if err := d.Finish(); err != nil {
		return nil, err
	}
	return v, nil
}

// peekTV reads only Last.
func peekTV(b []byte) (int64, error) {
	if len(b) < 2 || b[0] != 1 {
		return 0, errors.New("tv header")
	}
	last, n := binary.Varint(b[1:])
	if n <= 0 {
		return 0, errors.New("tv last")
	}
	return last, nil
}

// rec is the model's view of a tv.
type rec struct {
	Last int64
	N    uint64
	Pad  int
}

func (r rec) value() *tv {
	return &tv{Last: r.Last, N: r.N, Pad: bytes.Repeat([]byte{byte(r.N)}, r.Pad)}
}

func recOf(v *tv) rec { return rec{Last: v.Last, N: v.N, Pad: len(v.Pad)} }

func mustOpen(t testing.TB, opts Options) *Store {
	t.Helper()
	s, err := Open(opts)
	if err != nil {
		t.Fatalf("open: %v", err)
	}
	return s
}

// checkCacheInvariants checks the invariants written on budget and Table
// for every table of s.
func checkCacheInvariants(s *Store) error {
	var sum int64
	for _, f := range s.tables {
		t, ok := f.(*Table[*tv])
		if !ok {
			return fmt.Errorf("unexpected table type %T", f)
		}
		if t.index.n != len(t.slots) {
			return fmt.Errorf("table %s: %d index entries, %d slots", t.name, t.index.n, len(t.slots))
		}
		live := 0
		for _, e := range t.index.ents {
			if e != 0 {
				live++
			}
		}
		if live != t.index.n {
			return fmt.Errorf("table %s: index holds %d entries, counts %d", t.name, live, t.index.n)
		}
		for i, sl := range t.slots {
			if int(sl.idx) != i {
				return fmt.Errorf("table %s: slots[%d].idx = %d", t.name, i, sl.idx)
			}
			if t.lookup(sl.Key) != sl {
				return fmt.Errorf("table %s: slot %q not in the index", t.name, sl.Key)
			}
			if sl.evicted {
				return fmt.Errorf("table %s: cached slot %q marked evicted", t.name, sl.Key)
			}
			if want := sl.Value.SizeBytes() + len(sl.Key) + slotOverhead; int(sl.size) != want {
				return fmt.Errorf("table %s: slot %q size %d, want %d", t.name, sl.Key, sl.size, want)
			}
			sum += int64(sl.size)
		}
		for _, k := range t.free {
			sum += k.size
		}
	}
	if sum != s.budget.used.Load() {
		return fmt.Errorf("budget.used = %d, sum of slot sizes and kept values = %d", s.budget.used.Load(), sum)
	}
	return nil
}

// scanRaw returns every key/value of the committed database (not the
// pending batch) with the given one-byte tag.
func scanRaw(t testing.TB, db *pebble.DB, tag byte) map[string][]byte {
	t.Helper()
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: []byte{tag}, UpperBound: []byte{tag + 1}})
	if err != nil {
		t.Fatal(err)
	}
	out := map[string][]byte{}
	for ok := it.First(); ok; ok = it.Next() {
		out[string(it.Key())] = bytes.Clone(it.Value())
	}
	if err := it.Close(); err != nil {
		t.Fatal(err)
	}
	return out
}

// storedRecords decodes every committed record of table.
func storedRecords(t testing.TB, db *pebble.DB, table string) map[string]rec {
	t.Helper()
	r := storedRecordsErr(db, table)
	if r.err != nil {
		t.Fatal(r.err)
	}
	return r.m
}

type recordsOrErr struct {
	m   map[string]rec
	err error
}

// storedRecordsErr decodes every committed record of table.
func storedRecordsErr(db *pebble.DB, table string) recordsOrErr {
	prefix := RecordKey(nil, table, "")
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: prefix, UpperBound: prefixEnd(prefix)})
	if err != nil {
		return recordsOrErr{err: err}
	}
	out := map[string]rec{}
	for ok := it.First(); ok; ok = it.Next() {
		d, err := decodeTV(it.Value())
		if err != nil {
			it.Close()
			return recordsOrErr{err: fmt.Errorf("stored %q: %w", it.Key(), err)}
		}
		out[string(it.Key()[len(prefix):])] = recOf(d)
	}
	return recordsOrErr{m: out, err: it.Close()}
}
