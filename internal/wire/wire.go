// Package wire holds the small varint reader shared by the decoders of the
// root and store packages: a sticky error checked once at the end, so a
// decoder reads straight through its fields without a check per field.
package wire

import (
	"encoding/binary"
	"errors"
	"fmt"
)

var (
	// ErrTruncated reports input that ended inside a field.
	ErrTruncated = errors.New("truncated")
	// ErrTrailing reports bytes left over after the last field.
	ErrTrailing = errors.New("trailing bytes")
)

// Decoder reads fields from B. After the first failure every read returns
// a zero value and Err keeps the first error.
type Decoder struct {
	B   []byte
	Err error
}

func (d *Decoder) short(what string) {
	if d.Err == nil {
		d.Err = fmt.Errorf("%w %s", ErrTruncated, what)
	}
}

// Byte reads one byte.
func (d *Decoder) Byte() byte {
	if d.Err != nil || len(d.B) < 1 {
		d.short("byte")
		return 0
	}
	v := d.B[0]
	d.B = d.B[1:]
	return v
}

// Uvarint reads an unsigned varint.
func (d *Decoder) Uvarint() uint64 {
	if d.Err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.B)
	if n <= 0 {
		d.short("uvarint")
		return 0
	}
	d.B = d.B[n:]
	return v
}

// Varint reads a signed varint.
func (d *Decoder) Varint() int64 {
	if d.Err != nil {
		return 0
	}
	v, n := binary.Varint(d.B)
	if n <= 0 {
		d.short("varint")
		return 0
	}
	d.B = d.B[n:]
	return v
}

// Len reads a uvarint length and checks that many bytes remain, so a
// corrupt length can never drive a huge allocation.
func (d *Decoder) Len() int {
	n := d.Uvarint()
	if d.Err == nil && n > uint64(len(d.B)) {
		d.short("length")
		return 0
	}
	return int(n)
}

// Bytes reads n bytes without copying.
func (d *Decoder) Bytes(n int) []byte {
	if d.Err != nil {
		return nil
	}
	if n < 0 || n > len(d.B) {
		d.short("bytes")
		return nil
	}
	v := d.B[:n:n]
	d.B = d.B[n:]
	return v
}

// Finish returns the sticky error, or an error if bytes remain.
func (d *Decoder) Finish() error {
	if d.Err != nil {
		return d.Err
	}
	if len(d.B) != 0 {
		return fmt.Errorf("%w: %d", ErrTrailing, len(d.B))
	}
	return nil
}
