package window

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
)

// Sentinel errors. Decoders and Validate wrap them with context; test with
// errors.Is.
var (
	// ErrUnknownVersion: the first byte of an encoding is not a format
	// version this package reads.
	ErrUnknownVersion = errors.New("window: unknown encoding version")
	// ErrWrongKind: the kind byte names another aggregate than the receiver.
	ErrWrongKind = errors.New("window: encoding of another aggregate kind")
	// ErrTrailingBytes: a well-formed encoding is followed by extra bytes.
	ErrTrailingBytes = errors.New("window: trailing bytes after encoding")
	// ErrCorrupt: the bytes are truncated, malformed, or describe a state
	// that the receiver's spec cannot hold.
	ErrCorrupt = errors.New("window: corrupt encoding")
	// ErrInvalidSpec: a spec field is out of range. Every problem is reported
	// as a *SpecError wrapping this sentinel.
	ErrInvalidSpec = errors.New("window: invalid spec")
)

// SpecError names one invalid field of a spec. It matches ErrInvalidSpec
// under errors.Is.
type SpecError struct {
	Spec    string // type name, e.g. "SlidingSpec"
	Field   string
	Problem string
}

func (e *SpecError) Error() string {
	return fmt.Sprintf("window: %s.%s %s", e.Spec, e.Field, e.Problem)
}

// Is reports whether target is ErrInvalidSpec.
func (e *SpecError) Is(target error) bool { return target == ErrInvalidSpec }

// specErrs collects every problem of one spec, joined by errors.Join.
type specErrs struct {
	spec string
	errs []error
}

func (s *specErrs) check(ok bool, field, problem string) {
	if !ok {
		s.errs = append(s.errs, &SpecError{Spec: s.spec, Field: field, Problem: problem})
	}
}

func (s *specErrs) positive(field string, x int64) { s.check(x > 0, field, "must be > 0") }

func (s *specErrs) nonNegative(field string, x int64) { s.check(x >= 0, field, "must be >= 0") }

func (s *specErrs) err() error { return errors.Join(s.errs...) }

// Format version and kind bytes. Frozen: values are never reused or edited;
// a new layout gets a new version.
const (
	version1 byte = 1

	kindSlidingCount byte = 1
	kindSlidingSum   byte = 2
	kindSlidingMin   byte = 3
	kindSlidingMax   byte = 4
	kindSlidingMean  byte = 5
	kindDecayed      byte = 6
	kindVelocity     byte = 7
	kindRecency      byte = 8
)

const flagSeen byte = 1

// reader decodes with a sticky error, checked once by the caller.
type reader struct {
	b   []byte
	err error
}

func (r *reader) fail(what string) {
	if r.err == nil {
		r.err = fmt.Errorf("%w: %s", ErrCorrupt, what)
	}
}

func (r *reader) byte1(what string) byte {
	if r.err != nil {
		return 0
	}
	if len(r.b) == 0 {
		r.fail("truncated " + what)
		return 0
	}
	x := r.b[0]
	r.b = r.b[1:]
	return x
}

func (r *reader) uvarint(what string) uint64 {
	if r.err != nil {
		return 0
	}
	x, n := binary.Uvarint(r.b)
	if n <= 0 {
		r.fail("bad uvarint " + what)
		return 0
	}
	r.b = r.b[n:]
	return x
}

// varint reads a zigzag-encoded signed varint (encoding/binary.Varint).
func (r *reader) varint(what string) int64 {
	x := r.uvarint(what)
	return int64(x>>1) ^ -int64(x&1)
}

// float reads 8 bytes little-endian IEEE 754; NaN is rejected.
func (r *reader) float(what string) float64 {
	if r.err != nil {
		return 0
	}
	if len(r.b) < 8 {
		r.fail("truncated " + what)
		return 0
	}
	x := math.Float64frombits(binary.LittleEndian.Uint64(r.b))
	r.b = r.b[8:]
	if math.IsNaN(x) {
		r.fail("NaN " + what)
	}
	return x
}

// count reads an element count and checks that at least min bytes per
// element remain, so a corrupt count never causes a large allocation.
func (r *reader) count(what string, min int) int {
	x := r.uvarint(what)
	if r.err == nil && x > uint64(len(r.b)/min) {
		r.fail(what + " exceeds input")
		return 0
	}
	return int(x)
}

// header checks the version byte, the kind byte and the flags byte, whose
// bits outside known must be zero.
func (r *reader) header(kind, known byte) (flags byte) {
	if len(r.b) == 0 {
		r.err = fmt.Errorf("%w: empty input", ErrCorrupt)
		return 0
	}
	if r.b[0] != version1 {
		r.err = fmt.Errorf("%w: %d", ErrUnknownVersion, r.b[0])
		return 0
	}
	r.b = r.b[1:]
	k := r.byte1("kind")
	if r.err == nil && k != kind {
		r.err = fmt.Errorf("%w: kind %d, want %d", ErrWrongKind, k, kind)
		return 0
	}
	flags = r.byte1("flags")
	if flags&^known != 0 {
		r.fail("unknown flags")
	}
	return flags
}

// end reports the sticky error, or ErrTrailingBytes if input remains.
func (r *reader) end() error {
	if r.err == nil && len(r.b) > 0 {
		return fmt.Errorf("%w: %d", ErrTrailingBytes, len(r.b))
	}
	return r.err
}

// errInvalidAgg is returned by encoders and decoders of an aggregate built
// from an invalid spec.
var errInvalidAgg = fmt.Errorf("%w: aggregate built from an invalid spec", ErrInvalidSpec)

// appendHeader appends version, kind and flags, and maxT when the state is
// not empty. done is true when nothing more follows (empty state or error).
func appendHeader(dst []byte, valid, seen bool, kind, flags byte, maxT int64) (out []byte, done bool, err error) {
	if !valid {
		return dst, true, errInvalidAgg
	}
	if !seen {
		return append(dst, version1, kind, 0), true, nil
	}
	dst = append(dst, version1, kind, flags|flagSeen)
	return binary.AppendVarint(dst, maxT), false, nil
}

// decodeTwoPass runs decode once to check b without storing anything, then
// again to store, so the receiver is unchanged on error and no scratch
// state is allocated.
func decodeTwoPass(valid bool, what string, b []byte, decode func(b []byte, store bool) error) error {
	if !valid {
		return errInvalidAgg
	}
	if err := decode(b, false); err != nil {
		return fmt.Errorf("window: decode %d-byte %s state: %w", len(b), what, err)
	}
	return decode(b, true)
}

// startState reads the header; it returns ok when a non-empty state
// follows. For an empty state it ends the input and, when storing, calls
// reset.
func (r *reader) startState(kind, known byte, store bool, reset func()) (flags byte, maxT int64, ok bool) {
	flags = r.header(kind, known)
	if r.err != nil || flags&flagSeen == 0 {
		if r.err == nil && flags != 0 {
			r.fail("flags without events")
		}
		if err := r.end(); err == nil && store {
			reset()
		} else {
			r.err = err
		}
		return flags, 0, false
	}
	return flags, r.varint("maxT"), true
}

func appendFloat(dst []byte, x float64) []byte {
	return binary.LittleEndian.AppendUint64(dst, math.Float64bits(x))
}

// Saturating int64 arithmetic: times near the ends of the int64 range must
// not wrap around.
func satSub(a, b int64) int64 {
	d := a - b
	if (b > 0 && d > a) || (b < 0 && d < a) {
		if b > 0 {
			return math.MinInt64
		}
		return math.MaxInt64
	}
	return d
}

func satAdd(a, b int64) int64 {
	s := a + b
	if b > 0 && s < a {
		return math.MaxInt64
	}
	if b < 0 && s > a {
		return math.MinInt64
	}
	return s
}

// floorDiv is floor(a / b) for b > 0.
func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// startOf is idx · width for width > 0, saturated to the int64 range.
func startOf(idx, width int64) int64 {
	if idx < math.MinInt64/width {
		return math.MinInt64
	}
	if idx > math.MaxInt64/width {
		return math.MaxInt64
	}
	return idx * width
}
