package check

import (
	"errors"
	"testing"
)

func TestProblemsReportsEveryField(t *testing.T) {
	p := For("pkg.Spec")
	p.Check(false, "A", "must be > %d", 0)
	p.Check(true, "B", "never")
	p.Check(false, "C", "must be set")
	err := p.Err()
	if !errors.Is(err, ErrInvalidSpec) {
		t.Fatalf("%v does not match ErrInvalidSpec", err)
	}
	var fields []string
	for _, e := range err.(interface{ Unwrap() []error }).Unwrap() {
		var se *SpecError
		if !errors.As(e, &se) {
			t.Fatalf("%v is not a *SpecError", e)
		}
		fields = append(fields, se.Field)
	}
	if len(fields) != 2 || fields[0] != "A" || fields[1] != "C" || err.Error() != "pkg.Spec.A must be > 0\npkg.Spec.C must be set" {
		t.Fatalf("got %q", err)
	}
	if For("x").Err() != nil {
		t.Fatal("no problems must give nil")
	}
}
