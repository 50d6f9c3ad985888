package specfile_test

import (
	"encoding/json"
	"errors"
	"math"
	"strconv"
	"testing"

	"github.com/tallyward/tallyward/specfile"
)

func testSchema(t testing.TB) *specfile.Schema {
	f, err := specfile.Parse("s.yaml", []byte(base+"      - {name: a, kind: sliding_count, window: 1h}\n"))
	if err != nil {
		t.Fatal(err)
	}
	return f.Schema
}

func TestJSONDecoder(t *testing.T) {
	s := testSchema(t)
	dec := s.NewJSONDecoder()
	ok := []struct {
		line    string
		time    int64
		kind    string
		account string
		amount  float64
	}{
		{`{"ts": 1000, "kind": "login", "account": "a1"}`, 1e9, "login", "a1", 0},
		{`{"account":"a\u00e9\"\\/\n","ts":"2000","kind":"x","amount":-1.5e2,"extra":{"deep":[1,{"x":null}]}}`, 2e9, "x", "a\u00e9\"\\/\n", -150},
		{` {"ts":3,"kind":"k","account":12345,"amount":null} `, 3e6, "k", "12345", 0},
		{`{"ts":4,"kind":"\ud83d\ude00","account":"b","amount":"7"}`, 4e6, "\U0001F600", "b", 7},
	}
	for _, c := range ok {
		ev, err := dec.Decode([]byte(c.line))
		if err != nil {
			t.Errorf("%s: %v", c.line, err)
			continue
		}
		if ev.Time != c.time || ev.Fields[0].Str != c.kind || ev.Fields[1].Str != c.account || ev.Fields[2].Num != c.amount {
			t.Errorf("%s: got %+v", c.line, ev)
		}
	}
	bad := []struct {
		line  string
		field string
		err   error
	}{
		{``, "", specfile.ErrBadSyntax},
		{`[1]`, "", specfile.ErrBadSyntax},
		{`{"ts":1,"kind":"k"}`, "account", specfile.ErrMissingField},
		{`{"kind":"k","account":"a"}`, "ts", specfile.ErrMissingField},
		{`{"ts":"soon","kind":"k","account":"a"}`, "ts", specfile.ErrBadTime},
		{`{"ts":1,"kind":"k","account":"a","amount":"lots"}`, "amount", specfile.ErrBadField},
		{`{"ts":1,"kind":"k","account":"a","amount":{"v":1}}`, "amount", specfile.ErrBadField},
		{`{"ts":1,"kind":"k","account":"a","account":"b"}`, "account", specfile.ErrBadSyntax},
		{`{"ts":1,"kind":"k","account":"a"} x`, "", specfile.ErrBadSyntax},
		{`{"ts":1,"kind":"k","account":"a\x01"}`, "", specfile.ErrBadSyntax},
		{`{"ts":1,"kind":"k","account":"a`, "", specfile.ErrBadSyntax},
		{`{"ts":1e400,"kind":"k","account":"a"}`, "ts", specfile.ErrBadTime},
		{`{"ts":01,"kind":"k","account":"a"}`, "", specfile.ErrBadSyntax},
	}
	for _, c := range bad {
		_, err := dec.Decode([]byte(c.line))
		var fe *specfile.FieldError
		if !errors.As(err, &fe) || !errors.Is(err, c.err) || fe.Field != c.field {
			t.Errorf("%q: got %v, want a FieldError for %q wrapping %v", c.line, err, c.field, c.err)
		}
	}
}

// FuzzJSONDecoder: no input panics; errors are *FieldError values; an
// accepted line is valid JSON (encoding/json agrees, the reference) and
// carries the same values encoding/json reads.
func FuzzJSONDecoder(f *testing.F) {
	for _, s := range []string{
		`{"ts": 1000, "kind": "login", "account": "a1"}`,
		`{"account":"a\u00e9","ts":"2000","kind":"x","amount":-1.5e2,"extra":{"deep":[1,{"x":null}]}}`,
		`{"ts":4,"kind":"\ud83d\ude00","account":"b","amount":true}`,
		`{"ts":1,"kind":"k","account":"a","amount":"lots"}`,
		`{"ts":"1","kind":"\ud800","account":"\\"}`,
		`{}`, `{`, `"`, `[[[[[[`,
	} {
		f.Add([]byte(s))
	}
	s := testSchema(f)
	f.Fuzz(func(t *testing.T, line []byte) {
		dec := s.NewJSONDecoder()
		ev, err := dec.Decode(line)
		if err != nil {
			var fe *specfile.FieldError
			if !errors.As(err, &fe) {
				t.Fatalf("error %v is not a *FieldError", err)
			}
			return
		}
		var ref map[string]any
		if err := json.Unmarshal(line, &ref); err != nil {
			t.Fatalf("accepted %q, which encoding/json rejects: %v", line, err)
		}
		for i, fld := range s.Fields {
			v, present := ref[fld.Name]
			switch x := v.(type) {
			case string:
				if fld.Type == specfile.String && x != ev.Fields[i].Str {
					t.Fatalf("%s: %q vs encoding/json %q", fld.Name, ev.Fields[i].Str, x)
				}
			case float64:
				if fld.Type == specfile.Number && x != ev.Fields[i].Num {
					t.Fatalf("%s: %v vs encoding/json %v", fld.Name, ev.Fields[i].Num, x)
				}
			case nil:
				if present && ev.Fields[i] != (specfile.Value{}) {
					t.Fatalf("%s: null read as %+v", fld.Name, ev.Fields[i])
				}
			}
		}
		if ts, ok := ref["ts"].(float64); ok && ts == math.Trunc(ts) && math.Abs(ts) < 1<<53 {
			if want := int64(ts) * 1e6; ev.Time != want {
				t.Fatalf("ts %v read as %d, want %d", ts, ev.Time, want)
			}
		}
		_ = strconv.Itoa
	})
}
