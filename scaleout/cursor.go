package scaleout

import (
	"encoding/binary"
	"errors"
	"fmt"
)

// ErrCursor is wrapped by errors decoding a stored cursor.
var ErrCursor = errors.New("scaleout: bad stored cursor")

const cursorV1 = 1

// cursor is the source position a partition's pipeline stores with each
// commit (Pipeline.Commit's cursor).
//
// Encoding, version 1:
//
//	byte    version (1)
//	uvarint resume: offset of the record at the pipeline's resume sequence
//	        number; a reopened pipeline is fed from here
//	uvarint head: offset of the first record not consumed; the group
//	        offset committed with this state
//
// Invariant: resume <= head. Varints are minimal; longer forms and
// trailing bytes are refused, so one cursor has one encoding.
type cursor struct {
	resume, head int64
}

func (c cursor) encode() []byte {
	b := []byte{cursorV1}
	b = binary.AppendUvarint(b, uint64(c.resume))
	return binary.AppendUvarint(b, uint64(c.head))
}

func decodeCursor(b []byte) (cursor, error) {
	if len(b) == 0 {
		return cursor{}, fmt.Errorf("%w: empty", ErrCursor)
	}
	if b[0] != cursorV1 {
		return cursor{}, fmt.Errorf("%w: unknown version %d", ErrCursor, b[0])
	}
	b = b[1:]
	r, n := binary.Uvarint(b)
	if n <= 0 || n != uvarintLen(r) {
		return cursor{}, fmt.Errorf("%w: bad resume offset", ErrCursor)
	}
	b = b[n:]
	h, n := binary.Uvarint(b)
	if n <= 0 || n != uvarintLen(h) {
		return cursor{}, fmt.Errorf("%w: bad head offset", ErrCursor)
	}
	if len(b) != n {
		return cursor{}, fmt.Errorf("%w: %d trailing bytes", ErrCursor, len(b)-n)
	}
	if r > h || h > 1<<62 {
		return cursor{}, fmt.Errorf("%w: resume %d past head %d", ErrCursor, r, h)
	}
	return cursor{resume: int64(r), head: int64(h)}, nil
}

func uvarintLen(v uint64) int {
	var b [binary.MaxVarintLen64]byte
	return binary.PutUvarint(b[:], v)
}
