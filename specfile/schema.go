package specfile

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"
)

// FieldType is the type of one event field.
type FieldType uint8

const (
	// String fields hold text: entity keys, items, categories.
	String FieldType = iota
	// Number fields hold a float64.
	Number
	// Bool fields hold true or false, read as 1 or 0 where a number is
	// wanted and as "true" or "false" where text is.
	Bool
)

var fieldTypeNames = [...]string{"string", "number", "bool"}

func (t FieldType) String() string {
	if int(t) < len(fieldTypeNames) {
		return fieldTypeNames[t]
	}
	return fmt.Sprintf("FieldType(%d)", t)
}

// TimeFormat says how the time field is written.
type TimeFormat uint8

const (
	// RFC3339 text, fractional seconds allowed ("2026-03-01T12:00:00.5Z").
	RFC3339 TimeFormat = iota
	// UnixSeconds, UnixMillis, UnixMicros, UnixNanos: a number (or
	// numeric text) counting from the Unix epoch. Seconds may carry a
	// fraction.
	UnixSeconds
	UnixMillis
	UnixMicros
	UnixNanos
	// Layout is text in the Go reference-time layout Schema.Layout,
	// read in UTC unless the layout carries a zone.
	Layout
)

var timeFormatNames = [...]string{"rfc3339", "unix_s", "unix_ms", "unix_us", "unix_ns", "layout"}

func (f TimeFormat) String() string {
	if int(f) < len(timeFormatNames) {
		return timeFormatNames[f]
	}
	return fmt.Sprintf("TimeFormat(%d)", f)
}

// Field is one declared event field.
type Field struct {
	Name string
	Type FieldType
	// Optional fields may be missing from a row: they then read as ""
	// (string), 0 (number) or false (bool). A missing required field
	// rejects the row.
	Optional bool
}

// Schema is the shape of the events a spec file reads.
//
// A Schema is immutable after Parse and safe for concurrent use.
type Schema struct {
	// Fields in declaration order; an Event's Fields use the same indices.
	Fields []Field
	// TimeField is the name of the column holding the event time. It is
	// not one of Fields.
	TimeField  string
	TimeFormat TimeFormat
	// Layout is the Go time layout for TimeFormat Layout.
	Layout string

	index map[string]int
}

// Value is one field of one event.
type Value struct {
	// Str is the text of a string field ("true"/"false" for bool fields).
	Str string
	// Num is the value of a number field (1/0 for bool fields).
	Num float64
}

// Event is one decoded event: the type the pipelines of a spec file run on.
type Event struct {
	// Time is the event time, Unix nanoseconds.
	Time int64
	// Fields holds one value per Schema field, in schema order.
	Fields []Value
}

// Index returns the position of the named field in Fields.
func (s *Schema) Index(name string) (int, bool) {
	i, ok := s.index[name]
	return i, ok
}

func (s *Schema) buildIndex() {
	s.index = make(map[string]int, len(s.Fields))
	for i, f := range s.Fields {
		s.index[f.Name] = i
	}
}

// Sentinel errors of row decoding; a *FieldError wraps one of them.
var (
	ErrMissingField = errors.New("missing field")
	ErrBadField     = errors.New("bad field value")
	ErrBadTime      = errors.New("unparseable time")
	ErrBadSyntax    = errors.New("malformed row")
)

// FieldError is a problem with one field of one row.
type FieldError struct {
	Field string // the field's name ("" for the row as a whole)
	Err   error  // one of the sentinels, possibly wrapped with detail
}

func (e *FieldError) Error() string {
	if e.Field == "" {
		return e.Err.Error()
	}
	return fmt.Sprintf("field %q: %v", e.Field, e.Err)
}

func (e *FieldError) Unwrap() error { return e.Err }

func fieldErr(field string, sentinel error, format string, args ...any) error {
	if format == "" {
		return &FieldError{Field: field, Err: sentinel}
	}
	return &FieldError{Field: field, Err: fmt.Errorf("%w: %s", sentinel, fmt.Sprintf(format, args...))}
}

// maxQuote bounds how much of a bad value an error message repeats.
const maxQuote = 40

func quote(s string) string {
	if len(s) > maxQuote {
		s = s[:maxQuote] + "..."
	}
	return strconv.Quote(s)
}

// NewEvent returns an event with room for every field.
func (s *Schema) NewEvent() Event { return Event{Fields: make([]Value, len(s.Fields))} }

// SetText stores text for field i, converting it to the field's type.
func (s *Schema) SetText(ev *Event, i int, text string) error {
	f := &s.Fields[i]
	switch f.Type {
	case String:
		ev.Fields[i] = Value{Str: text}
	case Number:
		v, err := strconv.ParseFloat(strings.TrimSpace(text), 64)
		if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
			return fieldErr(f.Name, ErrBadField, "%s is not a finite number", quote(text))
		}
		ev.Fields[i] = Value{Num: v}
	case Bool:
		b, err := strconv.ParseBool(strings.TrimSpace(text))
		if err != nil {
			return fieldErr(f.Name, ErrBadField, "%s is not true or false", quote(text))
		}
		ev.Fields[i] = boolValue(b)
	}
	return nil
}

// SetNumber stores a number for field i. A string field takes the
// number's shortest text.
func (s *Schema) SetNumber(ev *Event, i int, v float64) error {
	f := &s.Fields[i]
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return fieldErr(f.Name, ErrBadField, "%v is not a finite number", v)
	}
	switch f.Type {
	case String:
		ev.Fields[i] = Value{Str: strconv.FormatFloat(v, 'g', -1, 64)}
	case Number:
		ev.Fields[i] = Value{Num: v}
	case Bool:
		if v != 0 && v != 1 {
			return fieldErr(f.Name, ErrBadField, "%v is not true or false", v)
		}
		ev.Fields[i] = boolValue(v == 1)
	}
	return nil
}

// SetBool stores a boolean for field i.
func (s *Schema) SetBool(ev *Event, i int, b bool) error {
	f := &s.Fields[i]
	switch f.Type {
	case Number:
		return fieldErr(f.Name, ErrBadField, "%v is not a number", b)
	default:
		ev.Fields[i] = boolValue(b)
	}
	return nil
}

func boolValue(b bool) Value {
	if b {
		return Value{Str: "true", Num: 1}
	}
	return Value{Str: "false", Num: 0}
}

// TimeText parses the time field given as text.
func (s *Schema) TimeText(text string) (int64, error) {
	switch s.TimeFormat {
	case RFC3339:
		t, err := time.Parse(time.RFC3339Nano, strings.TrimSpace(text))
		if err != nil {
			return 0, fieldErr(s.TimeField, ErrBadTime, "%s is not RFC 3339", quote(text))
		}
		return unixNanos(t, s.TimeField, text)
	case Layout:
		t, err := time.Parse(s.Layout, strings.TrimSpace(text))
		if err != nil {
			return 0, fieldErr(s.TimeField, ErrBadTime, "%s does not match layout %q", quote(text), s.Layout)
		}
		return unixNanos(t, s.TimeField, text)
	}
	text = strings.TrimSpace(text)
	if s.TimeFormat != UnixSeconds {
		// Integer units are parsed exactly rather than through a float.
		if n, err := strconv.ParseInt(text, 10, 64); err == nil {
			return s.timeInt(n)
		}
	}
	v, err := strconv.ParseFloat(text, 64)
	if err != nil {
		return 0, fieldErr(s.TimeField, ErrBadTime, "%s is not a number of %s", quote(text), s.TimeFormat)
	}
	return s.TimeNumber(v)
}

var unitNanos = map[TimeFormat]float64{UnixSeconds: 1e9, UnixMillis: 1e6, UnixMicros: 1e3, UnixNanos: 1}

// TimeNumber converts a numeric time field.
func (s *Schema) TimeNumber(v float64) (int64, error) {
	switch s.TimeFormat {
	case RFC3339, Layout:
		return 0, fieldErr(s.TimeField, ErrBadTime, "a number where %s text is expected", s.TimeFormat)
	}
	if v == math.Trunc(v) && math.Abs(v) < 1<<53 {
		return s.timeInt(int64(v))
	}
	ns := v * unitNanos[s.TimeFormat]
	if math.IsNaN(ns) || ns >= math.MaxInt64 || ns <= math.MinInt64 {
		return 0, fieldErr(s.TimeField, ErrBadTime, "%v is out of range", v)
	}
	return int64(math.Round(ns)), nil
}

// TimeInt converts an integer time field (Parquet INT64, say).
func (s *Schema) TimeInt(n int64) (int64, error) {
	switch s.TimeFormat {
	case RFC3339, Layout:
		return 0, fieldErr(s.TimeField, ErrBadTime, "a number where %s text is expected", s.TimeFormat)
	}
	return s.timeInt(n)
}

func (s *Schema) timeInt(n int64) (int64, error) {
	mul := int64(unitNanos[s.TimeFormat])
	if n > math.MaxInt64/mul || n < math.MinInt64/mul {
		return 0, fieldErr(s.TimeField, ErrBadTime, "%d is out of range", n)
	}
	return n * mul, nil
}

func unixNanos(t time.Time, field, text string) (int64, error) {
	// UnixNano is undefined outside about 1678..2262.
	if t.Year() < 1678 || t.Year() > 2261 {
		return 0, fieldErr(field, ErrBadTime, "%s is out of range", quote(text))
	}
	return t.UnixNano(), nil
}

// FormatTime writes t (Unix nanoseconds) as RFC 3339 in UTC: the form
// feature tables use.
func FormatTime(t int64) string {
	return time.Unix(0, t).UTC().Format(time.RFC3339Nano)
}

// Check reports the first required field that seen marks as missing.
// seen has one entry per field; the time field is checked by the caller.
func (s *Schema) Check(seen []bool) error {
	for i, ok := range seen {
		if !ok && !s.Fields[i].Optional {
			return fieldErr(s.Fields[i].Name, ErrMissingField, "")
		}
	}
	return nil
}
