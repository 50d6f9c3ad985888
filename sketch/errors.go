package sketch

import (
	"errors"
	"fmt"
	"github.com/tallyward/tallyward/internal/check"

	"github.com/tallyward/tallyward/internal/wire"
)

// Sentinel errors, shared with package window (the same values, so
// errors.Is matches across packages). Every error returned by a decoder or
// a Merge wraps one of them with context; match with errors.Is.
var (
	// ErrUnknownVersion: the first byte is a format version this build
	// cannot read.
	ErrUnknownVersion = wire.ErrUnknownVersion
	// ErrTrailingBytes: the encoding is complete but bytes follow it.
	ErrTrailingBytes = wire.ErrTrailingBytes
	// ErrCorrupt: the bytes are truncated, of another kind, or describe a
	// state the type cannot hold.
	ErrCorrupt = wire.ErrCorrupt
	// ErrWrongKind: the kind byte names another summary. Such errors also
	// match ErrCorrupt.
	ErrWrongKind = wire.ErrWrongKind
	// ErrInvalidSpec: a spec or parameter set failed Validate.
	ErrInvalidSpec = check.ErrInvalidSpec
	// ErrIncompatible: Merge was asked to combine summaries built with
	// different parameters.
	ErrIncompatible = errors.New("sketch: incompatible parameters")
)

// Kind bytes. Frozen: a retired value is never reused.
const (
	kindDistinct     byte = 1
	kindCountMin     byte = 2
	kindTopK         byte = 3
	kindQuantile     byte = 4
	kindDistinctEver byte = 5
	formatVersion1   byte = 1
)

func corruptf(format string, args ...any) error {
	return fmt.Errorf("%s: %w", fmt.Sprintf(format, args...), ErrCorrupt)
}

// SpecError names one invalid field of a spec or parameter set; it
// matches ErrInvalidSpec under errors.Is. It is the same type as
// window.SpecError.
type SpecError = check.SpecError
