package sketch

import (
	"errors"
	"fmt"
)

// Sentinel errors. Every error returned by a decoder or a Merge wraps exactly
// one of them with context; match with errors.Is.
var (
	// ErrUnknownVersion: the first byte is a format version this build
	// cannot read.
	ErrUnknownVersion = errors.New("sketch: unknown format version")
	// ErrTrailingBytes: the encoding is complete but bytes follow it.
	ErrTrailingBytes = errors.New("sketch: trailing bytes after encoding")
	// ErrCorrupt: the bytes are truncated, of another kind, or describe a
	// state the type cannot hold.
	ErrCorrupt = errors.New("sketch: corrupt encoding")
	// ErrIncompatible: Merge was asked to combine summaries built with
	// different parameters.
	ErrIncompatible = errors.New("sketch: incompatible parameters")
	// ErrInvalidSpec: a spec or parameter set failed Validate.
	ErrInvalidSpec = errors.New("sketch: invalid parameters")
)

// Kind bytes. Frozen: a retired value is never reused.
const (
	kindDistinct   byte = 1
	kindCountMin   byte = 2
	kindTopK       byte = 3
	kindQuantiles  byte = 4
	formatVersion1 byte = 1
)

func corruptf(format string, args ...any) error {
	return fmt.Errorf("%s: %w", fmt.Sprintf(format, args...), ErrCorrupt)
}

// checkHeader validates the version and kind bytes shared by every encoding.
func checkHeader(b []byte, kind byte, name string) error {
	if len(b) < 2 {
		return corruptf("%s: header needs 2 bytes, have %d", name, len(b))
	}
	if b[0] != formatVersion1 {
		return fmt.Errorf("%s: version %d: %w", name, b[0], ErrUnknownVersion)
	}
	if b[1] != kind {
		return corruptf("%s: kind byte %d, want %d", name, b[1], kind)
	}
	return nil
}

// orDefault sets *v to def if it is the zero value.
func orDefault[T comparable](v *T, def T) {
	var zero T
	if *v == zero {
		*v = def
	}
}

// appendSpecErr appends one Validate problem, wrapping ErrInvalidSpec.
func appendSpecErr(errs []error, what, format string, args ...any) []error {
	return append(errs, fmt.Errorf("%s: %s: %w", what, fmt.Sprintf(format, args...), ErrInvalidSpec))
}
