package wire

import (
	"encoding/binary"
	"errors"
	"math"
	"testing"
)

// Reads against what encoding/binary wrote; the first failure sticks and
// every later read returns zero.
func TestDecoderReadsAndSticks(t *testing.T) {
	var b []byte
	b = append(b, 1, 7)
	b = binary.AppendUvarint(b, 300)
	b = binary.AppendVarint(b, -5)
	b = binary.BigEndian.AppendUint32(b, 0xdeadbeef)
	b = binary.BigEndian.AppendUint64(b, math.Float64bits(2.5))
	b = binary.LittleEndian.AppendUint64(b, math.Float64bits(-1.25))
	b = binary.AppendUvarint(b, 3)
	b = append(b, "abc"...)
	d := Decoder{B: b}
	d.Version(1)
	d.Kind(7)
	if d.Uvarint() != 300 || d.Varint() != -5 || d.Uint32BE() != 0xdeadbeef ||
		d.Float64BE() != 2.5 || d.Float64LE() != -1.25 || string(d.Bytes(d.Len())) != "abc" {
		t.Fatal("values differ from what was written")
	}
	if err := d.Finish(); err != nil {
		t.Fatal(err)
	}
	d = Decoder{B: []byte{1}}
	if d.Uint64BE() != 0 || !errors.Is(d.Err, ErrCorrupt) {
		t.Fatalf("truncated read: %v", d.Err)
	}
	first := d.Err
	if d.Byte() != 0 || d.Uvarint() != 0 || d.Err != first {
		t.Fatal("error did not stick")
	}
}

func TestDecoderErrors(t *testing.T) {
	d := Decoder{B: []byte{2}}
	d.Version(1)
	if !errors.Is(d.Err, ErrUnknownVersion) {
		t.Fatalf("version: %v", d.Err)
	}
	d = Decoder{B: []byte{9}}
	d.Kind(3)
	if !errors.Is(d.Err, ErrWrongKind) || !errors.Is(d.Err, ErrCorrupt) {
		t.Fatalf("kind: %v", d.Err)
	}
	d = Decoder{B: []byte{0, 1}}
	d.Byte()
	if err := d.Finish(); !errors.Is(err, ErrTrailingBytes) {
		t.Fatalf("trailing: %v", err)
	}
	// A count that the remaining bytes cannot hold fails before any
	// allocation could be sized from it.
	d = Decoder{B: binary.AppendUvarint(nil, 1<<40)}
	if d.Count(1, math.MaxUint64) != 0 || !errors.Is(d.Err, ErrCorrupt) {
		t.Fatalf("count: %v", d.Err)
	}
	d = Decoder{B: append(binary.AppendUvarint(nil, 5), 1, 2, 3, 4, 5)}
	if d.Count(1, 4) != 0 || !errors.Is(d.Err, ErrCorrupt) {
		t.Fatalf("count over max: %v", d.Err)
	}
	d = Decoder{B: binary.AppendUvarint(nil, 4)}
	if d.Len() != 0 || !errors.Is(d.Err, ErrCorrupt) {
		t.Fatalf("length: %v", d.Err)
	}
}

// AppendFramed writes what binary.AppendUvarint and append would, for
// bodies on both sides of the one-byte length.
func TestAppendFramed(t *testing.T) {
	for _, n := range []int{0, 1, 127, 128, 300, 20_000} {
		body := make([]byte, n)
		for i := range body {
			body[i] = byte(i*7 + n)
		}
		got, err := AppendFramed([]byte("head"), func(dst []byte) ([]byte, error) { return append(dst, body...), nil })
		if err != nil {
			t.Fatal(err)
		}
		want := append(binary.AppendUvarint([]byte("head"), uint64(n)), body...)
		if string(got) != string(want) {
			t.Fatalf("n=%d: framing differs", n)
		}
		d := Decoder{B: got[4:]}
		if string(d.Bytes(d.Len())) != string(body) || d.Finish() != nil {
			t.Fatalf("n=%d: does not read back", n)
		}
	}
}
