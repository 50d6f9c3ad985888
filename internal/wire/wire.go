// Package wire is the one byte decoder and the one set of decode errors of
// tallyward's persisted formats (packages window, sketch, the root and the
// store): a Decoder with a sticky error checked once at the end, so a
// decoder reads straight through its fields without a check per field,
// and sentinels that window and sketch re-export under their own names so
// errors.Is matches across packages.
//
// Every decode failure wraps exactly one of ErrUnknownVersion,
// ErrTrailingBytes or ErrCorrupt; a wrong kind byte wraps ErrWrongKind and
// ErrCorrupt both. Encoders write with encoding/binary directly.
package wire

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
)

// Decode errors. Wrapped with context; test with errors.Is.
var (
	// ErrUnknownVersion: the first byte of an encoding is not a format
	// version the decoder reads.
	ErrUnknownVersion = errors.New("unknown encoding version")
	// ErrTrailingBytes: a complete encoding is followed by extra bytes.
	ErrTrailingBytes = errors.New("trailing bytes after encoding")
	// ErrCorrupt: the bytes are truncated, malformed, or describe a state
	// the receiver cannot hold.
	ErrCorrupt = errors.New("corrupt encoding")
	// ErrWrongKind: the kind byte names another aggregate than the
	// receiver. Errors wrapping it also match ErrCorrupt.
	ErrWrongKind = errors.New("encoding of another kind")
)

// WrongKind returns the error for kind byte got where want was expected;
// it matches ErrWrongKind and ErrCorrupt.
func WrongKind(got, want byte) error {
	return fmt.Errorf("%w (%w): kind %d, want %d", ErrWrongKind, ErrCorrupt, got, want)
}

// UnknownVersion returns the error for an unread version byte.
func UnknownVersion(v byte) error { return fmt.Errorf("%w: %d", ErrUnknownVersion, v) }

// Decoder reads fields from B. After the first failure every read returns
// a zero value (fixed-size reads: zero bytes) and Err keeps the first error,
// which wraps ErrCorrupt.
type Decoder struct {
	B   []byte
	Err error
}

// Fail records a corruption with a message, unless an error is already
// recorded.
func (d *Decoder) Fail(format string, args ...any) {
	if d.Err == nil {
		d.Err = fmt.Errorf("%w: %s", ErrCorrupt, fmt.Sprintf(format, args...))
	}
}

// Version reads the version byte and fails with ErrUnknownVersion unless it
// is want. An empty input is ErrCorrupt.
func (d *Decoder) Version(want byte) {
	v := d.Byte()
	if d.Err == nil && v != want {
		d.Err = UnknownVersion(v)
	}
}

// Kind reads a kind byte and fails with WrongKind unless it is want.
func (d *Decoder) Kind(want byte) {
	k := d.Byte()
	if d.Err == nil && k != want {
		d.Err = WrongKind(k, want)
	}
}

// Byte reads one byte.
func (d *Decoder) Byte() byte {
	if b := d.Fixed(1); b != nil {
		return b[0]
	}
	return 0
}

// Fixed returns the next n bytes without copying, or nil after a failure.
func (d *Decoder) Fixed(n int) []byte {
	if d.Err != nil {
		return nil
	}
	if n < 0 || len(d.B) < n {
		d.Fail("truncated: %d bytes wanted, %d left", n, len(d.B))
		return nil
	}
	v := d.B[:n:n]
	d.B = d.B[n:]
	return v
}

// Uvarint reads an unsigned varint (encoding/binary).
func (d *Decoder) Uvarint() uint64 {
	if d.Err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.B)
	if n <= 0 {
		d.Fail("bad uvarint")
		return 0
	}
	d.B = d.B[n:]
	return v
}

// Varint reads a zigzag signed varint (encoding/binary).
func (d *Decoder) Varint() int64 {
	if d.Err != nil {
		return 0
	}
	v, n := binary.Varint(d.B)
	if n <= 0 {
		d.Fail("bad varint")
		return 0
	}
	d.B = d.B[n:]
	return v
}

// Uint32BE reads 4 bytes big endian.
func (d *Decoder) Uint32BE() uint32 {
	if b := d.Fixed(4); b != nil {
		return binary.BigEndian.Uint32(b)
	}
	return 0
}

// Uint64BE reads 8 bytes big endian.
func (d *Decoder) Uint64BE() uint64 {
	if b := d.Fixed(8); b != nil {
		return binary.BigEndian.Uint64(b)
	}
	return 0
}

// Uint64LE reads 8 bytes little endian.
func (d *Decoder) Uint64LE() uint64 {
	if b := d.Fixed(8); b != nil {
		return binary.LittleEndian.Uint64(b)
	}
	return 0
}

// Float64BE reads an IEEE 754 double, big endian. NaN is returned as read.
func (d *Decoder) Float64BE() float64 { return math.Float64frombits(d.Uint64BE()) }

// Float64LE reads an IEEE 754 double, little endian. NaN is returned as
// read.
func (d *Decoder) Float64LE() float64 { return math.Float64frombits(d.Uint64LE()) }

// Len reads a uvarint length and checks that many bytes remain, so a
// corrupt length can never drive a huge allocation.
func (d *Decoder) Len() int {
	n := d.Uvarint()
	if d.Err == nil && n > uint64(len(d.B)) {
		d.Fail("length %d exceeds the %d bytes left", n, len(d.B))
		return 0
	}
	return int(n)
}

// Count reads a uvarint element count, at most max, and checks that at
// least minBytes per element remain, so a corrupt count never drives a
// large allocation.
func (d *Decoder) Count(minBytes int, max uint64) int {
	n := d.Uvarint()
	switch {
	case d.Err != nil:
		return 0
	case n > max:
		d.Fail("count %d exceeds %d", n, max)
		return 0
	case minBytes > 0 && n > uint64(len(d.B)/minBytes):
		d.Fail("count %d needs %d bytes each, %d left", n, minBytes, len(d.B))
		return 0
	}
	return int(n)
}

// Bytes reads n bytes without copying.
func (d *Decoder) Bytes(n int) []byte { return d.Fixed(n) }

// Finish returns the sticky error, or ErrTrailingBytes if bytes remain.
func (d *Decoder) Finish() error {
	if d.Err != nil {
		return d.Err
	}
	if len(d.B) != 0 {
		return fmt.Errorf("%w: %d", ErrTrailingBytes, len(d.B))
	}
	return nil
}

// AppendFramed appends a uvarint length and then what body appends, the
// layout Len and Bytes read back. body writes straight into dst after a
// one-byte length guess, which is widened in place when the length needs
// more bytes, so no scratch buffer is needed.
func AppendFramed(dst []byte, body func(dst []byte) ([]byte, error)) ([]byte, error) {
	at := len(dst)
	dst, err := body(append(dst, 0))
	if err != nil {
		return dst, err
	}
	n := len(dst) - at - 1
	if n < 0x80 {
		dst[at] = byte(n)
		return dst, nil
	}
	var lb [binary.MaxVarintLen64]byte
	k := binary.PutUvarint(lb[:], uint64(n))
	dst = append(dst, lb[:k-1]...)
	copy(dst[at+k:], dst[at+1:at+1+n])
	copy(dst[at:], lb[:k])
	return dst, nil
}
