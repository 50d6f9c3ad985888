package specfile_test

import (
	"errors"
	"os"
	"strings"
	"testing"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

const base = `version: 1
events:
  time: {field: ts, format: unix_ms}
  fields:
    - {name: kind, type: string}
    - {name: account, type: string}
    - {name: amount, type: number, optional: true}
entities:
  - name: account
    key: account
    features:
`

// TestParseErrorsNameLineAndKey: each broken spec reports the line and the
// key of the problem.
func TestParseErrorsNameLineAndKey(t *testing.T) {
	cases := []struct {
		name, feature string // feature lines appended to base (line 12 on)
		whole         string // or a whole document
		line          int
		want          string
	}{
		{name: "unknown kind", feature: "      - {name: a, kind: slidng_count, window: 1h}", line: 12, want: `entities[0].features[0].kind: "slidng_count" is not a kind`},
		{name: "param of another kind", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        half_life: 2h", line: 15, want: "half_life: not a parameter of sliding_count"},
		{name: "bad duration", feature: "      - name: a\n        kind: sliding_count\n        window: 1 hour", line: 14, want: `window: "1 hour" is not a duration`},
		{name: "window not multiple", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        resolution: 7m", line: 12, want: "multiple of Resolution"},
		{name: "value on count", feature: "      - {name: a, kind: sliding_count, window: 1h, value: amount}", line: 12, want: "value: sliding_count takes no value"},
		{name: "value of string field", feature: "      - {name: a, kind: sliding_sum, window: 1h, value: kind}", line: 12, want: `field "kind" is string; number or bool wanted`},
		{name: "item missing", feature: "      - {name: a, kind: distinct, window: 1h}", line: 12, want: "item: required"},
		{name: "undeclared field in filter", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        when:\n          - {field: knd, equals: x}", line: 16, want: `when[0].field: "knd" is not a declared field`},
		{name: "comparison on string", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        when:\n          - {field: kind, above: 3}", line: 16, want: "comparisons need a number field"},
		{name: "two tests", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        when:\n          - {field: kind, equals: x, in: [y]}", line: 16, want: "not several"},
		{name: "number set with text", feature: "      - name: a\n        kind: sliding_count\n        window: 1h\n        when:\n          - {field: amount, in: [1, two]}", line: 16, want: "two is not a number"},
		{name: "duplicate feature", feature: "      - {name: a, kind: sliding_count, window: 1h}\n      - {name: a, kind: sliding_count, window: 2h}", line: 13, want: `feature "a" defined twice`},
		{name: "quantile without q", feature: "      - {name: a, kind: quantile, value: amount}", line: 12, want: "q: required by quantile"},
		{name: "bad stat", feature: "      - {name: a, kind: decayed, half_life: 1h, stat: median}", line: 12, want: `stat: "median" is not one of`},
		{name: "unknown key", feature: "      - {name: a, kind: sliding_count, window: 1h, windw: 2h}", line: 12, want: `unknown field "windw"`},
		{name: "syntax", whole: "version: 1\nevents: [\n", line: 2, want: "not found"},
		{name: "version", whole: strings.Replace(base, "version: 1", "version: 2", 1) + "      - {name: a, kind: sliding_count, window: 1h}", line: 1, want: "version: must be 1"},
		{name: "key not a field", whole: strings.Replace(base, "key: account", "key: acount", 1) + "      - {name: a, kind: sliding_count, window: 1h}", line: 10, want: `key: "acount" is not a declared field`},
		{name: "time format", whole: strings.Replace(base, "unix_ms", "unix_weeks", 1) + "      - {name: a, kind: sliding_count, window: 1h}", line: 3, want: `events.time.format: "unix_weeks"`},
		{name: "bad mode", whole: base + "      - {name: a, kind: sliding_count, window: 1h}\nrun: {mode: lazy}", line: 13, want: `run.mode: "lazy"`},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			doc := c.whole
			if doc == "" {
				doc = base + c.feature + "\n"
			}
			_, err := specfile.Parse("s.yaml", []byte(doc))
			if err == nil {
				t.Fatalf("no error for\n%s", doc)
			}
			if !errors.Is(err, specfile.ErrSpec) {
				t.Fatalf("error %v does not match ErrSpec", err)
			}
			var se *specfile.Error
			errors.As(err, &se)
			for _, p := range se.Problems {
				if strings.Contains(p.Path+": "+p.Msg, c.want) {
					if p.Line != c.line {
						t.Errorf("problem %q on line %d, want %d", p.Msg, p.Line, c.line)
					}
					if !strings.Contains(err.Error(), "s.yaml:") {
						t.Errorf("message %q does not name the file", err)
					}
					return
				}
			}
			t.Errorf("no problem containing %q in:\n%v", c.want, err)
		})
	}
}

// TestParseReportsEveryProblem: problems in different places are all
// reported by one Parse.
func TestParseReportsEveryProblem(t *testing.T) {
	doc := strings.Replace(base, "type: number", "type: numbr", 1) +
		"      - {name: a, kind: sliding_count, window: 1h, value: amount}\n      - {name: b, kind: top_share, capacity: 4}\n"
	_, err := specfile.Parse("s.yaml", []byte(doc))
	var se *specfile.Error
	if !errors.As(err, &se) || len(se.Problems) < 3 {
		t.Fatalf("want at least 3 problems, got %v", err)
	}
}

func TestDurations(t *testing.T) {
	for in, want := range map[string]string{"90s": "1m30s", "7d": "168h0m0s", "2w": "336h0m0s", "1h30m": "1h30m0s"} {
		d, err := specfile.ParseDuration(in)
		if err != nil || d.String() != want {
			t.Errorf("ParseDuration(%q) = %v, %v; want %s", in, d, err, want)
		}
	}
	for _, in := range []string{"", "d", "1.5d", "-2d", "99999999999999d", "1 hour"} {
		if _, err := specfile.ParseDuration(in); err == nil {
			t.Errorf("ParseDuration(%q) accepted", in)
		}
	}
}

// FuzzParse: no spec file makes Parse panic; a rejected one is an *Error
// with at least one problem, an accepted one has entities and features.
func FuzzParse(f *testing.F) {
	for _, name := range []string{"testdata/all_kinds.yaml"} {
		b, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte(base + "      - {name: a, kind: sliding_count, window: 1h}\n"))
	f.Add([]byte("version: 1\nevents: [\n"))
	f.Add([]byte("&a [*a]"))
	f.Add([]byte("version: 1\nentities:\n  - name: x\n    features: [{kind: recency, stat: age, when: [{field: y, in: [{a: b}]}]}]\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		sf, err := specfile.Parse("fuzz.yaml", data)
		if err != nil {
			var se *specfile.Error
			if !errors.As(err, &se) || len(se.Problems) == 0 {
				t.Fatalf("error %v is not an *Error with problems", err)
			}
			return
		}
		if len(sf.Spec.Entities) == 0 || sf.Schema == nil {
			t.Fatalf("accepted a spec without entities")
		}
		for _, e := range sf.Spec.Entities {
			if len(e.Features) == 0 || e.Key == nil {
				t.Fatalf("accepted entity %q without features or key", e.Name)
			}
		}
	})
}

// TestEveryKindCovered: testdata/all_kinds.yaml uses every kind the spec
// file knows, and what each feature reads agrees with its kind's Inputs.
func TestEveryKindCovered(t *testing.T) {
	f, err := specfile.Load("testdata/all_kinds.yaml")
	if err != nil {
		t.Fatal(err)
	}
	seen := map[string]bool{}
	for _, ent := range f.Spec.Entities {
		for _, ft := range ent.Features {
			desc := ft.Kind.Describe()
			seen[strings.Fields(desc)[0]] = true
			in := ft.Kind.Inputs()
			if (ft.Item != nil) != (in&tallyward.TakesItem != 0) {
				t.Errorf("%s.%s (%s): item set %v, kind takes items %v", ent.Name, ft.Name, desc, ft.Item != nil, in&tallyward.TakesItem != 0)
			}
			if ft.Value != nil && in&tallyward.TakesValue == 0 {
				t.Errorf("%s.%s (%s): value set but the kind takes none", ent.Name, ft.Name, desc)
			}
		}
	}
	for _, k := range specfile.KindNames() {
		if !seen[strings.ReplaceAll(k, "_", "-")] && !seen[descName(k)] {
			t.Errorf("kind %s is not used in testdata/all_kinds.yaml", k)
		}
	}
}

// descName maps a spec-file kind name to the first word of its Describe.
func descName(k string) string {
	switch k {
	case "decayed":
		return "decayed-count"
	case "recency":
		return "recency-since-last"
	}
	return strings.ReplaceAll(k, "_", "-")
}
