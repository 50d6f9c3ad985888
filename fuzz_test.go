package tallyward

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/tallyward/tallyward/internal/store"
)

// richRecord builds a record of every kind of richSpec's account entity
// after a few events, for fuzz seeds.
func richRecord(t testing.TB) (*record, func() []Aggregate) {
	spec := richSpec(nil)
	var kinds []Kind
	for _, f := range spec.Entities[1].Features {
		kinds = append(kinds, f.Kind)
	}
	fresh := func() []Aggregate {
		out := make([]Aggregate, len(kinds))
		for i, k := range kinds {
			out[i] = k.NewAggregate(time.Second)
		}
		return out
	}
	r := bareRecord(fresh())
	for i, e := range genLogins(5, 40, 3, 3, 0) {
		for _, a := range r.aggs(nil) {
			a.Add(e.T, e.Amount, uint64(i%3))
		}
		r.last = e.T
	}
	return r, fresh
}

// Invariant 7 (DESIGN.md): the entity record decoder (and through it every
// feature decoder) never panics, rejects with errors only, and re-encodes
// what it accepts to bytes that decode to the same encoding.
func FuzzRecordDecode(f *testing.F) {
	rec, fresh := richRecord(f)
	good, err := rec.AppendBinary(nil)
	if err != nil {
		f.Fatal(err)
	}
	empty, _ := (bareRecord(fresh())).AppendBinary(nil)
	f.Add(good)
	f.Add(empty)
	f.Add(good[:len(good)/2])
	f.Add(append(bytes.Clone(good), 0))
	f.Add([]byte{2})
	f.Fuzz(func(t *testing.T, b []byte) {
		r, err := decodeRecord(b, fresh)
		if err != nil {
			if r != nil {
				t.Fatal("record returned with an error")
			}
			return
		}
		again, err := r.AppendBinary(nil)
		if err != nil {
			t.Fatalf("accepted record does not re-encode: %v", err)
		}
		r2, err := decodeRecord(again, fresh)
		if err != nil {
			t.Fatalf("re-encoded record does not decode: %v", err)
		}
		third, _ := r2.AppendBinary(nil)
		if !bytes.Equal(again, third) {
			t.Fatal("encoding not stable after one round trip")
		}
	})
}

func FuzzProgressDecode(f *testing.F) {
	pr := progress{hasMax: true, maxT: t0, c: counters{events: 9, applied: 7, live: 3, rejected: [numReasons]uint64{1, 2, 3, 4, 5}},
		skipReread: []uint64{4, 8, 15}, resumeNewest: newestTime{true, t0 - 5}, hasReset: true, resetSeq: 9, resetTo: t0 - 9, resetWm: t0 - 2}
	f.Add(pr.append(nil))
	for _, name := range []string{"progress_v1.bin", "progress_v2.bin"} {
		b, err := os.ReadFile(filepath.Join("testdata", name))
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte{1, 0})
	f.Fuzz(func(t *testing.T, b []byte) {
		var out progress
		if err := out.decode(b); err != nil {
			if !errors.Is(err, store.ErrCorrupt) {
				t.Fatalf("error does not wrap ErrCorrupt: %v", err)
			}
			return
		}
		var back progress
		if err := back.decode(out.append(nil)); err != nil {
			t.Fatalf("re-encoded progress does not decode: %v", err)
		}
	})
}

func FuzzMarkDecode(f *testing.F) {
	m := store.Mark{Seen: 10, Resume: 7, Watermark: t0, Cursor: []byte("offset-42"), Extra: []byte{1, 2}}
	good, _ := m.AppendBinary(nil)
	f.Add(good)
	f.Add(good[:5])
	f.Fuzz(func(t *testing.T, b []byte) {
		var out store.Mark
		if err := out.UnmarshalBinary(b); err != nil {
			if !errors.Is(err, store.ErrCorrupt) {
				t.Fatalf("error does not wrap ErrCorrupt: %v", err)
			}
			if out.Seen != 0 || out.Cursor != nil {
				t.Fatal("receiver changed on error")
			}
			return
		}
		again, _ := out.AppendBinary(nil)
		if !bytes.Equal(again, b) {
			t.Fatal("accepted mark does not re-encode to the same bytes")
		}
	})
}
