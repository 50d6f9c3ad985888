package join

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strings"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/internal/attach"
	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// Errors returned by this package; test with errors.Is.
var (
	// ErrNotOpen: Attach was given a pipeline that is closed or was not
	// made by tallyward.Open.
	ErrNotOpen = errors.New("join: pipeline is not open")
	// ErrCorrupt wraps every error decoding stored join state.
	ErrCorrupt = errors.New("join: corrupt stored state")
	// ErrDefinitionChanged: the store holds state of a join of the same
	// name with another definition. Use a new name (or a new store).
	ErrDefinitionChanged = errors.New("join: definition changed")
	// ErrNotAttached: an event reached a join before Attach.
	ErrNotAttached = errors.New("join: Attach was not called before the first event")
)

// Codec turns events into bytes and back, for the events a join holds in
// the store. The zero Codec uses encoding/json, which suits events whose
// fields are exported; set both functions for anything else. The bytes
// are stored as they are: a change of encoding is a change of stored
// state.
type Codec[E any] struct {
	// Append appends e's encoding to dst. Default: JSON.
	Append func(dst []byte, e E) ([]byte, error)
	// Decode decodes one event. Default: JSON.
	Decode func(b []byte) (E, error)
}

func (c Codec[E]) orJSON() Codec[E] {
	if c.Append == nil {
		c.Append = func(dst []byte, e E) ([]byte, error) {
			b, err := json.Marshal(e)
			return append(dst, b...), err
		}
	}
	if c.Decode == nil {
		c.Decode = func(b []byte) (E, error) {
			var e E
			err := json.Unmarshal(b, &e)
			return e, err
		}
	}
	return c
}

func validName(s string) bool {
	return s != "" && len(s) <= 200 && strings.IndexFunc(s, func(r rune) bool {
		return !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '_' || r == '.' || r == '-')
	}) < 0
}

// attachPart loads part name's committed keys from p's store through load
// and registers part, so every commit of p stages it. desc is the join's
// definition in canonical text: it is stored under key "d" with the first
// commit, and a stored one that differs makes attachPart fail with
// ErrDefinitionChanged, since held state shaped by another definition
// (another maturity, window or feature list) would be misread.
func attachPart[E any](p *tallyward.Pipeline[E], name, desc string, part store.Part, load func(k, v []byte) error) error {
	st, ok := attach.Store(p)
	if !ok {
		return ErrNotOpen
	}
	dp := &describedPart{Part: part, desc: desc}
	if err := st.ScanPart(name, func(k, v []byte) error {
		if string(k) == "d" {
			dp.written = true
			if string(v) != desc {
				return fmt.Errorf("%w: join %q was stored as %q, is now %q", ErrDefinitionChanged, name, v, desc)
			}
			return nil
		}
		if err := load(k, v); err != nil {
			return fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
		return nil
	}); err != nil {
		return err
	}
	return st.AddPart(name, dp)
}

// describedPart writes the join's definition with the first commit.
type describedPart struct {
	store.Part
	desc    string
	written bool
}

func (p *describedPart) Stage(w *store.PartWriter) error {
	if !p.written {
		if err := w.Set([]byte("d"), []byte(p.desc)); err != nil {
			return err
		}
		p.written = true
	}
	return p.Part.Stage(w)
}

// Persisted encodings share these pieces: floats as 8 raw bytes
// (little-endian IEEE 754 bits, so NaN payloads survive), strings and
// blobs as uvarint length then bytes.

func appendFloats(dst []byte, vs []float64) []byte {
	dst = binary.AppendUvarint(dst, uint64(len(vs)))
	for _, v := range vs {
		dst = binary.LittleEndian.AppendUint64(dst, math.Float64bits(v))
	}
	return dst
}

func readFloats(d *wire.Decoder) []float64 {
	n := d.Len()
	if d.Err != nil {
		return nil
	}
	if n*8 > len(d.B) {
		d.Err = fmt.Errorf("%d floats in %d bytes", n, len(d.B))
		return nil
	}
	out := make([]float64, n)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(d.Bytes(8)))
	}
	return out
}

func appendBytes(dst, b []byte) []byte {
	dst = binary.AppendUvarint(dst, uint64(len(b)))
	return append(dst, b...)
}

func readBytes(d *wire.Decoder) []byte { return d.Bytes(d.Len()) }

func checkVersion(d *wire.Decoder, what string, want byte) error {
	if v := d.Byte(); d.Err == nil && v != want {
		return fmt.Errorf("%s: unknown version %d", what, v)
	}
	return nil
}
