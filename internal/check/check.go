// Package check is the one way tallyward's specs report problems: each
// problem is a *SpecError naming the spec type and the field, all of a
// spec's problems are reported at once (errors.Join), and every one
// matches ErrInvalidSpec under errors.Is. Packages window and sketch
// export the same type and sentinel under their own names.
package check

import (
	"errors"
	"fmt"
)

// ErrInvalidSpec is matched by every *SpecError.
var ErrInvalidSpec = errors.New("invalid spec")

// SpecError names one invalid field of a spec.
type SpecError struct {
	Spec    string // qualified type name, e.g. "window.SlidingSpec"
	Field   string
	Problem string
}

func (e *SpecError) Error() string { return fmt.Sprintf("%s.%s %s", e.Spec, e.Field, e.Problem) }

// Is reports whether target is ErrInvalidSpec.
func (e *SpecError) Is(target error) bool { return target == ErrInvalidSpec }

// Problems collects the problems of one spec.
type Problems struct {
	spec string
	errs []error
}

// For starts collecting the problems of the named spec type.
func For(spec string) *Problems { return &Problems{spec: spec} }

// Check records a problem with field unless ok.
func (p *Problems) Check(ok bool, field, format string, args ...any) {
	if !ok {
		p.errs = append(p.errs, &SpecError{Spec: p.spec, Field: field, Problem: fmt.Sprintf(format, args...)})
	}
}

// Err returns every recorded problem, joined, or nil.
func (p *Problems) Err() error { return errors.Join(p.errs...) }
