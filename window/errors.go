package window

import (
	"encoding/binary"
	"fmt"
	"math"
	"time"

	"github.com/tallyward/tallyward/internal/check"
	"github.com/tallyward/tallyward/internal/sat"
	"github.com/tallyward/tallyward/internal/wire"
)

// Sentinel errors, shared with package sketch (the same values, so
// errors.Is matches across packages). Decoders and Validate wrap them with
// context; test with errors.Is.
var (
	// ErrUnknownVersion: the first byte of an encoding is not a format
	// version this package reads.
	ErrUnknownVersion = wire.ErrUnknownVersion
	// ErrWrongKind: the kind byte names another aggregate than the
	// receiver. Such errors also match ErrCorrupt.
	ErrWrongKind = wire.ErrWrongKind
	// ErrTrailingBytes: a well-formed encoding is followed by extra bytes.
	ErrTrailingBytes = wire.ErrTrailingBytes
	// ErrCorrupt: the bytes are truncated, malformed, or describe a state
	// that the receiver's spec cannot hold.
	ErrCorrupt = wire.ErrCorrupt
	// ErrInvalidSpec: a spec field is out of range. Every problem is reported
	// as a *SpecError wrapping this sentinel.
	ErrInvalidSpec = check.ErrInvalidSpec
)

// SpecError names one invalid field of a spec; it matches ErrInvalidSpec
// under errors.Is. It is the same type as sketch.SpecError.
type SpecError = check.SpecError

// specErrs collects every problem of one spec, joined by errors.Join. It
// allocates only once a check fails, so validating a good spec (as Init
// does for every aggregate built in place) costs no allocation.
type specErrs struct {
	spec string
	p    *check.Problems
}

func newSpecErrs(spec string) specErrs { return specErrs{spec: spec} }

func (s *specErrs) check(ok bool, field, problem string) {
	if ok {
		return
	}
	if s.p == nil {
		s.p = check.For("window." + s.spec)
	}
	s.p.Check(false, field, "%s", problem)
}

func (s *specErrs) positive(field string, x time.Duration) { s.check(x > 0, field, "must be > 0") }

func (s *specErrs) nonNegative(field string, x time.Duration) { s.check(x >= 0, field, "must be >= 0") }

func (s *specErrs) err() error {
	if s.p == nil {
		return nil
	}
	return s.p.Err()
}

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
	kindSurge        byte = 9
)

const flagSeen byte = 1

// readFloat reads 8 bytes little-endian IEEE 754; NaN is rejected.
func readFloat(d *wire.Decoder, what string) float64 {
	x := d.Float64LE()
	if d.Err == nil && math.IsNaN(x) {
		d.Fail("NaN %s", what)
	}
	return x
}

// header checks the version byte, the kind byte and the flags byte, whose
// bits outside known must be zero.
func header(d *wire.Decoder, kind, known byte) (flags byte) {
	if len(d.B) == 0 {
		d.Fail("empty input")
		return 0
	}
	d.Version(version1)
	d.Kind(kind)
	flags = d.Byte()
	if flags&^known != 0 {
		d.Fail("unknown flags %#x", flags)
	}
	return flags
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
func startState(d *wire.Decoder, kind, known byte, store bool, reset func()) (flags byte, maxT int64, ok bool) {
	flags = header(d, kind, known)
	if d.Err != nil || flags&flagSeen == 0 {
		if d.Err == nil && flags != 0 {
			d.Fail("flags without events")
		}
		if err := d.Finish(); err == nil && store {
			reset()
		} else {
			d.Err = err
		}
		return flags, 0, false
	}
	return flags, d.Varint(), true
}

func appendFloat(dst []byte, x float64) []byte {
	return binary.LittleEndian.AppendUint64(dst, math.Float64bits(x))
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// startOf is idx · width for width > 0, saturated to the int64 range.
func startOf(idx, width int64) int64 { return sat.Mul(idx, width) }
