package sketch

import (
	"encoding/binary"
	"fmt"

	"github.com/tallyward/tallyward/internal/wire"
)

// header starts decoding d's input: it checks the version and kind bytes
// shared by every encoding, leaves d positioned after them with Err set
// if they are wrong, and returns d. The caller owns d (on its stack, so a
// decode allocates no decoder).
func header(d *wire.Decoder, kind byte) *wire.Decoder {
	if len(d.B) < 2 {
		d.Fail("header needs 2 bytes, have %d", len(d.B))
	}
	d.Version(formatVersion1)
	d.Kind(kind)
	return d
}

// named adds the summary's name to a decode error.
func named(name string, err error) error {
	if err == nil {
		return nil
	}
	return fmt.Errorf("sketch: %s: %w", name, err)
}

func appendU64(dst []byte, v uint64) []byte { return binary.BigEndian.AppendUint64(dst, v) }

func appendU32(dst []byte, v uint32) []byte { return binary.BigEndian.AppendUint32(dst, v) }

// bitWriter and bitReader carry Rice-coded integers (Golomb, "Run-length
// encodings", IEEE Trans. Inf. Theory 12(3), 1966; Rice's power-of-two case),
// most significant bit first.
type bitWriter struct {
	buf  []byte
	acc  uint64
	nacc uint
}

func (w *bitWriter) write(v uint64, n uint) {
	for n > 0 {
		take := min(n, 56-w.nacc)
		w.acc = w.acc<<take | (v>>(n-take))&(1<<take-1)
		w.nacc += take
		n -= take
		for w.nacc >= 8 {
			w.buf = append(w.buf, byte(w.acc>>(w.nacc-8)))
			w.nacc -= 8
		}
	}
}

func (w *bitWriter) rice(v uint64, k uint) {
	for q := v >> k; q > 0; q-- {
		w.write(1, 1)
	}
	w.write(0, 1)
	w.write(v, k)
}

func (w *bitWriter) flush() []byte {
	if w.nacc > 0 {
		w.buf = append(w.buf, byte(w.acc<<(8-w.nacc)))
		w.nacc = 0
	}
	return w.buf
}

type bitReader struct {
	b   []byte
	pos uint64 // bit position
	bad bool
}

func (r *bitReader) bit() uint64 {
	if r.pos >= uint64(len(r.b))*8 {
		r.bad = true
		return 0
	}
	v := uint64(r.b[r.pos>>3]>>(7-r.pos&7)) & 1
	r.pos++
	return v
}

func (r *bitReader) read(n uint) uint64 {
	var v uint64
	for range n {
		v = v<<1 | r.bit()
	}
	return v
}

// rice reads one Rice-coded value; quotients above maxQ are rejected.
func (r *bitReader) rice(k uint, maxQ uint64) uint64 {
	var q uint64
	for r.bit() == 1 {
		q++
		if q > maxQ {
			r.bad = true
			return 0
		}
	}
	return q<<k | r.read(k)
}

// padOK reports whether the unread bits of the last byte are zero and no
// whole byte is left unread.
func (r *bitReader) padOK() bool {
	if r.bad {
		return false
	}
	end := uint64(len(r.b)) * 8
	if end-r.pos >= 8 {
		return false
	}
	for r.pos < end {
		if r.bit() != 0 {
			return false
		}
	}
	return true
}
