package sketch

import (
	"encoding/binary"
	"fmt"
	"math"
)

// reader is a byte decoder with a sticky error: after the first failure
// every read returns zero and the error is checked once at the end.
type reader struct {
	b    []byte
	off  int
	err  error
	name string
}

func (r *reader) fail(format string, args ...any) {
	if r.err == nil {
		r.err = corruptf("%s: offset %d: %s", r.name, r.off, fmt.Sprintf(format, args...))
	}
}

func (r *reader) byte1() byte { return r.fixed(1)[0] }

func (r *reader) uvarint() uint64 { return readVarint(r, binary.Uvarint) }

func (r *reader) varint() int64 { return readVarint(r, binary.Varint) }

// readVarint decodes one varint with f (binary.Uvarint or binary.Varint).
func readVarint[T uint64 | int64](r *reader, f func([]byte) (T, int)) T {
	if r.err != nil {
		return 0
	}
	v, n := f(r.b[r.off:])
	if n <= 0 {
		r.fail("bad varint")
		return 0
	}
	r.off += n
	return v
}

// fixed returns the next n bytes, or n zero bytes after a failure.
func (r *reader) fixed(n int) []byte {
	if r.err == nil && len(r.b)-r.off < n {
		r.fail("truncated")
	}
	if r.err != nil {
		return make([]byte, n)
	}
	r.off += n
	return r.b[r.off-n : r.off]
}

func (r *reader) u32() uint32 { return binary.BigEndian.Uint32(r.fixed(4)) }

func (r *reader) u64() uint64 { return binary.BigEndian.Uint64(r.fixed(8)) }

func (r *reader) f64() float64 { return math.Float64frombits(r.u64()) }

// bytesN returns the next n bytes without copying.
func (r *reader) bytesN(n uint64) []byte {
	if r.err != nil {
		return nil
	}
	if n > uint64(len(r.b)-r.off) {
		r.fail("length %d exceeds remaining %d bytes", n, len(r.b)-r.off)
		return nil
	}
	v := r.b[r.off : r.off+int(n)]
	r.off += int(n)
	return v
}

// count reads a uvarint element count and rejects counts that cannot fit in
// the remaining bytes at minBytes per element, so a hostile count never
// drives a large allocation.
func (r *reader) count(minBytes int, max uint64) int {
	n := r.uvarint()
	if r.err != nil {
		return 0
	}
	if n > max {
		r.fail("count %d exceeds limit %d", n, max)
		return 0
	}
	if minBytes > 0 && n > uint64(len(r.b)-r.off)/uint64(minBytes) {
		r.fail("count %d needs at least %d bytes each, %d remain", n, minBytes, len(r.b)-r.off)
		return 0
	}
	return int(n)
}

// done returns the sticky error, or ErrTrailingBytes if input remains.
func (r *reader) done() error {
	if r.err != nil {
		return r.err
	}
	if r.off != len(r.b) {
		return fmt.Errorf("%s: %d bytes after offset %d: %w", r.name, len(r.b)-r.off, r.off, ErrTrailingBytes)
	}
	return nil
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
