package specfile

import (
	"errors"
	"fmt"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/goccy/go-yaml"
	"github.com/goccy/go-yaml/ast"
	"github.com/goccy/go-yaml/parser"
	"github.com/tallyward/tallyward"
)

// The YAML document. Key names are documented in REFERENCE.md; keep the
// two in step.
type fileDoc struct {
	Version  int         `yaml:"version"`
	Events   eventsDoc   `yaml:"events"`
	Run      runDoc      `yaml:"run"`
	Output   outputDoc   `yaml:"output"`
	Entities []entityDoc `yaml:"entities"`
}

type eventsDoc struct {
	Time   timeDoc    `yaml:"time"`
	Fields []fieldDoc `yaml:"fields"`
}

type timeDoc struct {
	Field  string `yaml:"field"`
	Format string `yaml:"format"`
	Layout string `yaml:"layout"`
}

type fieldDoc struct {
	Name     string `yaml:"name"`
	Type     string `yaml:"type"`
	Optional bool   `yaml:"optional"`
}

type runDoc struct {
	Mode        string `yaml:"mode"`
	MaxDisorder string `yaml:"max_disorder"`
	FutureSkew  string `yaml:"future_skew"`
	Lateness    string `yaml:"late_events"`
	TTL         string `yaml:"idle_expiry"`
	CommitEvery int    `yaml:"commit_every"`
}

type outputDoc struct {
	Fields []string `yaml:"fields"`
}

type entityDoc struct {
	Name     string       `yaml:"name"`
	Key      string       `yaml:"key"`
	Features []featureDoc `yaml:"features"`
}

type featureDoc struct {
	Name        string         `yaml:"name"`
	Kind        string         `yaml:"kind"`
	When        []conditionDoc `yaml:"when"`
	Value       string         `yaml:"value"`
	Item        string         `yaml:"item"`
	BeforeEvent bool           `yaml:"before_event"`

	Window           string   `yaml:"window"`
	Resolution       string   `yaml:"resolution"`
	HalfLife         string   `yaml:"half_life"`
	Stat             string   `yaml:"stat"`
	Short            string   `yaml:"short"`
	Long             string   `yaml:"long"`
	Smoothing        *float64 `yaml:"smoothing"`
	Gap              string   `yaml:"gap"`
	Precision        *int     `yaml:"precision"`
	Epsilon          *float64 `yaml:"epsilon"`
	Delta            *float64 `yaml:"delta"`
	Capacity         *int     `yaml:"capacity"`
	Q                *float64 `yaml:"q"`
	RelativeAccuracy *float64 `yaml:"relative_accuracy"`
}

type conditionDoc struct {
	Field     string   `yaml:"field"`
	Equals    any      `yaml:"equals"`
	NotEquals any      `yaml:"not_equals"`
	In        []any    `yaml:"in"`
	NotIn     []any    `yaml:"not_in"`
	Above     *float64 `yaml:"above"`
	AtLeast   *float64 `yaml:"at_least"`
	Below     *float64 `yaml:"below"`
	AtMost    *float64 `yaml:"at_most"`
}

// File is a loaded spec file: the schema of its events, the pipeline
// options and the feature spec, ready for tallyward.Open.
type File struct {
	// Name is the file's path as given (used in messages).
	Name string
	// Schema is the shape of the input events.
	Schema *Schema
	// Options carries the run: section (Mode, MaxDisorder, FutureSkew,
	// Lateness, TTL, CommitEvery); the caller sets Dir and the rest.
	Options tallyward.Options
	// Spec holds the entities and features; the caller sets Emit.
	Spec tallyward.Spec[Event]
	// OutputFields are the indices of the event fields copied into every
	// row of a feature table, in order.
	OutputFields []int
}

// Problem is one thing wrong with a spec file.
type Problem struct {
	Line int    // 1-based; 0 when unknown
	Path string // the key, e.g. "entities[0].features[2].window"
	Msg  string
}

// Error lists every problem found in a spec file.
type Error struct {
	File     string
	Problems []Problem
}

func (e *Error) Error() string {
	var b strings.Builder
	for i, p := range e.Problems {
		if i > 0 {
			b.WriteByte('\n')
		}
		fmt.Fprintf(&b, "%s:%d: ", e.File, p.Line)
		if p.Path != "" {
			b.WriteString(p.Path + ": ")
		}
		b.WriteString(p.Msg)
	}
	return b.String()
}

// ErrSpec is matched (errors.Is) by every *Error.
var ErrSpec = errors.New("invalid spec file")

func (e *Error) Is(target error) bool { return target == ErrSpec }

// Load reads and parses the spec file at path.
func Load(path string) (*File, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	return Parse(path, data)
}

// maxSpecBytes bounds a spec file; real ones are a few kilobytes.
const maxSpecBytes = 4 << 20

// Parse parses a spec file's bytes; name is used in messages. Every
// problem is reported at once, each with its line and key.
func Parse(name string, data []byte) (f *File, err error) {
	l := &loader{name: name}
	defer func() {
		// The YAML library is third-party code fed user input: a panic
		// in it is reported as a problem with the file, not a crash.
		if r := recover(); r != nil {
			f, err = nil, &Error{File: name, Problems: []Problem{{Msg: fmt.Sprintf("unreadable YAML (%v)", r)}}}
		}
	}()
	if len(data) > maxSpecBytes {
		return nil, &Error{File: name, Problems: []Problem{{Msg: fmt.Sprintf("larger than %d bytes", maxSpecBytes)}}}
	}
	ast, perr := parser.ParseBytes(data, 0)
	if perr != nil {
		l.yamlErr(perr)
		return nil, l.err()
	}
	l.ast = ast
	var doc fileDoc
	if err := yaml.UnmarshalWithOptions(data, &doc, yaml.DisallowUnknownField()); err != nil {
		l.yamlErr(err)
		return nil, l.err()
	}
	f = l.compile(&doc)
	if err := l.err(); err != nil {
		return nil, err
	}
	return f, nil
}

type loader struct {
	name     string
	ast      *ast.File
	problems []Problem
}

func (l *loader) err() error {
	if len(l.problems) == 0 {
		return nil
	}
	return &Error{File: l.name, Problems: l.problems}
}

func (l *loader) yamlErr(err error) {
	var ye yaml.Error
	line := 0
	msg := err.Error()
	if errors.As(err, &ye) {
		if tk := ye.GetToken(); tk != nil && tk.Position != nil {
			line = tk.Position.Line
		}
		msg = ye.GetMessage()
	}
	l.problems = append(l.problems, Problem{Line: line, Msg: msg})
}

// add records a problem at the YAML path (without the leading "$."),
// finding its line: the key itself, or the nearest enclosing one present.
func (l *loader) add(path, format string, args ...any) {
	l.problems = append(l.problems, Problem{Line: l.line(path), Path: path, Msg: fmt.Sprintf(format, args...)})
}

func (l *loader) line(path string) int {
	if l.ast == nil {
		return 0
	}
	for p := path; ; {
		yp, err := yaml.PathString("$." + p)
		if p == "" {
			yp, err = yaml.PathString("$")
		}
		if err == nil {
			if n, err := yp.FilterFile(l.ast); err == nil && n != nil {
				if tk := n.GetToken(); tk != nil && tk.Position != nil {
					return tk.Position.Line
				}
			}
		}
		if p == "" {
			return 0
		}
		i := strings.LastIndexAny(p, ".[")
		if i < 0 {
			p = ""
		} else {
			p = p[:i]
		}
	}
}

// ParseDuration reads a duration: Go's syntax ("90s", "1h30m") plus whole
// days ("7d") and weeks ("2w").
func ParseDuration(s string) (time.Duration, error) {
	s = strings.TrimSpace(s)
	for unit, d := range map[string]time.Duration{"d": 24 * time.Hour, "w": 7 * 24 * time.Hour} {
		if n, ok := strings.CutSuffix(s, unit); ok {
			v, err := strconv.ParseInt(n, 10, 64)
			if err != nil || v < 0 || v > math.MaxInt64/int64(d) {
				return 0, fmt.Errorf("%q is not a duration", s)
			}
			return time.Duration(v) * d, nil
		}
	}
	d, err := time.ParseDuration(s)
	if err != nil {
		return 0, fmt.Errorf("%q is not a duration (e.g. 90s, 15m, 24h, 7d)", s)
	}
	return d, nil
}

func (l *loader) duration(path, text string) time.Duration {
	if text == "" {
		return 0
	}
	d, err := ParseDuration(text)
	if err != nil {
		l.add(path, "%v", err)
		return 0
	}
	if d <= 0 {
		l.add(path, "must be positive")
	}
	return d
}

var fieldTypes = map[string]FieldType{"string": String, "number": Number, "bool": Bool}

var timeFormats = map[string]TimeFormat{"rfc3339": RFC3339, "unix_s": UnixSeconds, "unix_ms": UnixMillis,
	"unix_us": UnixMicros, "unix_ns": UnixNanos, "layout": Layout}

func (l *loader) compile(doc *fileDoc) *File {
	if doc.Version != 1 {
		l.add("version", "must be 1 (got %d)", doc.Version)
	}
	s := l.schema(&doc.Events)
	f := &File{Name: l.name, Schema: s}
	f.Spec.Time = func(e Event) int64 { return e.Time }
	l.run(&doc.Run, &f.Options)
	if len(doc.Entities) == 0 {
		l.add("entities", "at least one entity is required")
	}
	entNames := map[string]bool{}
	for i := range doc.Entities {
		ed := &doc.Entities[i]
		path := fmt.Sprintf("entities[%d]", i)
		if !validName(ed.Name) {
			l.add(path+".name", "%q must be non-empty letters, digits, _ . -", ed.Name)
		} else if entNames[ed.Name] {
			l.add(path+".name", "entity %q defined twice", ed.Name)
		}
		entNames[ed.Name] = true
		ent := tallyward.Entity[Event]{Name: ed.Name}
		if ki, ok := l.fieldOf(s, path+".key", ed.Key, String); ok {
			ent.Key = func(e Event) string { return e.Fields[ki].Str }
		}
		if len(ed.Features) == 0 {
			l.add(path+".features", "entity %q has no features", ed.Name)
		}
		featNames := map[string]bool{}
		for j := range ed.Features {
			fd := &ed.Features[j]
			fpath := fmt.Sprintf("%s.features[%d]", path, j)
			if !validName(fd.Name) {
				l.add(fpath+".name", "%q must be non-empty letters, digits, _ . -", fd.Name)
			} else if featNames[fd.Name] {
				l.add(fpath+".name", "feature %q defined twice in entity %q", fd.Name, ed.Name)
			}
			featNames[fd.Name] = true
			if feat, ok := l.feature(s, fpath, fd); ok {
				ent.Features = append(ent.Features, feat)
			}
		}
		f.Spec.Entities = append(f.Spec.Entities, ent)
	}
	l.output(doc, s, f)
	return f
}

func (l *loader) schema(ed *eventsDoc) *Schema {
	s := &Schema{TimeField: ed.Time.Field, Layout: ed.Time.Layout}
	if ed.Time.Field == "" {
		l.add("events.time.field", "required: the column holding the event time")
	}
	tf, ok := timeFormats[orText(ed.Time.Format, "rfc3339")]
	if !ok {
		l.add("events.time.format", "%q is not one of rfc3339, unix_s, unix_ms, unix_us, unix_ns, layout", ed.Time.Format)
	}
	s.TimeFormat = tf
	switch {
	case tf == Layout && ed.Time.Layout == "":
		l.add("events.time.layout", "required with format layout (a Go reference-time layout such as \"2006-01-02 15:04:05\")")
	case tf != Layout && ed.Time.Layout != "":
		l.add("events.time.layout", "only used with format layout")
	}
	if len(ed.Fields) == 0 {
		l.add("events.fields", "at least one field is required")
	}
	seen := map[string]bool{ed.Time.Field: true}
	for i, fd := range ed.Fields {
		path := fmt.Sprintf("events.fields[%d]", i)
		if fd.Name == "" {
			l.add(path+".name", "required")
		} else if seen[fd.Name] {
			l.add(path+".name", "field %q declared twice (or is the time field)", fd.Name)
		}
		seen[fd.Name] = true
		ft, ok := fieldTypes[fd.Type]
		if !ok {
			l.add(path+".type", "%q is not one of string, number, bool", fd.Type)
		}
		s.Fields = append(s.Fields, Field{Name: fd.Name, Type: ft, Optional: fd.Optional})
	}
	s.buildIndex()
	return s
}

func (l *loader) run(rd *runDoc, o *tallyward.Options) {
	switch rd.Mode {
	case "", "eager":
		o.Mode = tallyward.Eager
	case "settled":
		o.Mode = tallyward.Settled
	default:
		l.add("run.mode", "%q is not one of eager, settled", rd.Mode)
	}
	switch rd.Lateness {
	case "", "drop":
		o.Lateness = tallyward.DropLate
	case "apply":
		o.Lateness = tallyward.ApplyLate
	default:
		l.add("run.late_events", "%q is not one of drop, apply", rd.Lateness)
	}
	if rd.MaxDisorder != "" {
		d, err := ParseDuration(rd.MaxDisorder)
		if err != nil {
			l.add("run.max_disorder", "%v", err)
		}
		o.MaxDisorder = d
	}
	o.FutureSkew = l.duration("run.future_skew", rd.FutureSkew)
	switch rd.TTL {
	case "":
	case "never":
		o.TTL = -1
	default:
		o.TTL = l.duration("run.idle_expiry", rd.TTL)
	}
	if rd.CommitEvery < 0 {
		l.add("run.commit_every", "must be positive")
	}
	o.CommitEvery = rd.CommitEvery
	if err := o.Validate(); err != nil {
		l.add("run", "%v", err)
	}
}

// fieldOf resolves a field name used at path and checks its type.
func (l *loader) fieldOf(s *Schema, path, name string, types ...FieldType) (int, bool) {
	if name == "" {
		l.add(path, "required")
		return 0, false
	}
	i, ok := s.Index(name)
	if !ok {
		if name == s.TimeField {
			l.add(path, "%q is the time field, not usable here", name)
		} else {
			l.add(path, "%q is not a declared field", name)
		}
		return 0, false
	}
	if !slices.Contains(types, s.Fields[i].Type) {
		l.add(path, "field %q is %v; %s wanted", name, s.Fields[i].Type, typeList(types))
		return 0, false
	}
	return i, true
}

func typeList(ts []FieldType) string {
	var names []string
	for _, t := range ts {
		names = append(names, t.String())
	}
	return strings.Join(names, " or ")
}

func (l *loader) feature(s *Schema, path string, fd *featureDoc) (tallyward.Feature[Event], bool) {
	feat := tallyward.Feature[Event]{Name: fd.Name, BeforeEvent: fd.BeforeEvent}
	info, ok := kinds[fd.Kind]
	if !ok {
		l.add(path+".kind", "%q is not a kind (one of %s)", fd.Kind, strings.Join(KindNames(), ", "))
		return feat, false
	}
	before := len(l.problems)
	for _, p := range fd.setParams() {
		if !slices.Contains(info.params, p) {
			l.add(path+"."+p, "not a parameter of %s (it takes %s)", fd.Kind, strings.Join(info.params, ", "))
		}
	}
	d := durations{}
	for key, text := range fd.durationParams() {
		if slices.Contains(info.params, key) {
			d[key] = l.duration(path+"."+key, text)
		}
	}
	// A parameter that did not parse would only add noise below.
	paramsOK := len(l.problems) == before
	switch info.input(fd) {
	case inNone:
		if fd.Value != "" {
			l.add(path+".value", "%s takes no value", fd.Kind)
		}
		if fd.Item != "" {
			l.add(path+".item", "%s counts no items", fd.Kind)
		}
	case inValue:
		if fd.Item != "" {
			l.add(path+".item", "%s counts no items", fd.Kind)
		}
		if fd.Value != "" {
			if vi, ok := l.fieldOf(s, path+".value", fd.Value, Number, Bool); ok {
				feat.Value = func(e Event) float64 { return e.Fields[vi].Num }
			}
		}
	case inItem:
		if fd.Value != "" {
			l.add(path+".value", "%s takes no value", fd.Kind)
		}
		if ii, ok := l.fieldOf(s, path+".item", fd.Item, String); ok {
			feat.Item = func(e Event) string { return e.Fields[ii].Str }
		}
	}
	if len(fd.When) > 0 {
		feat.Where = l.conditions(s, path+".when", fd.When)
	}
	if !paramsOK {
		return feat, false
	}
	k, err := info.build(fd, d)
	if err != nil {
		l.add(path, "%v", err)
		return feat, false
	}
	if err := k.Validate(); err != nil {
		for _, e := range splitJoined(err) {
			l.add(path, "%s: %v", fd.Kind, e)
		}
		return feat, false
	}
	feat.Kind = k
	return feat, len(l.problems) == before
}

// splitJoined unpacks an errors.Join so each problem gets its own line.
func splitJoined(err error) []error {
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		var out []error
		for _, e := range j.Unwrap() {
			out = append(out, splitJoined(e)...)
		}
		return out
	}
	return []error{err}
}

func (l *loader) output(doc *fileDoc, s *Schema, f *File) {
	if len(doc.Output.Fields) == 0 {
		// Default: the entity key fields, once each, in entity order.
		for _, ed := range doc.Entities {
			if i, ok := s.Index(ed.Key); ok && !slices.Contains(f.OutputFields, i) {
				f.OutputFields = append(f.OutputFields, i)
			}
		}
		return
	}
	for i, name := range doc.Output.Fields {
		path := fmt.Sprintf("output.fields[%d]", i)
		fi, ok := l.fieldOf(s, path, name, String, Number, Bool)
		if !ok {
			continue
		}
		if slices.Contains(f.OutputFields, fi) {
			l.add(path, "field %q listed twice", name)
			continue
		}
		f.OutputFields = append(f.OutputFields, fi)
	}
}

// validName matches the Go API's rule for entity and feature names.
func validName(s string) bool {
	if s == "" || len(s) > 200 {
		return false
	}
	return strings.IndexFunc(s, func(r rune) bool {
		return !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '_' || r == '.' || r == '-')
	}) < 0
}
