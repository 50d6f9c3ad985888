package source_test

import (
	"errors"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

// TestBadInputRows: each malformed row, between two good ones, is
// rejected with a message naming file:line and the problem, counted, and
// contributes nothing; with no tolerance, it stops the read with
// ErrTooManyBadRows and the same message.
func TestBadInputRows(t *testing.T) {
	goodJSON := `{"ts":1767225600000,"kind":"login","account":"a1"}`
	goodCSV := "1767225600000,login,a1,,"
	cases := []struct {
		name, ext, bad, want string
		sentinel             error
	}{
		{"json syntax", "jsonl", `{"ts":1767225600000,"kind":"login",`, "malformed row", specfile.ErrBadSyntax},
		{"json not object", "jsonl", `[1,2]`, "expected a JSON object", specfile.ErrBadSyntax},
		{"json missing field", "jsonl", `{"ts":1767225600000,"kind":"login"}`, `field "account": missing field`, specfile.ErrMissingField},
		{"json missing time", "jsonl", `{"kind":"login","account":"a"}`, `field "ts": missing field`, specfile.ErrMissingField},
		{"json bad time", "jsonl", `{"ts":"yesterday","kind":"login","account":"a"}`, `field "ts": unparseable time`, specfile.ErrBadTime},
		{"json bad number", "jsonl", `{"ts":1767225600000,"kind":"k","account":"a","amount":"ten"}`, `field "amount": bad field value`, specfile.ErrBadField},
		{"json bad bool", "jsonl", `{"ts":1767225600000,"kind":"k","account":"a","ok":"maybe"}`, `field "ok"`, specfile.ErrBadField},
		{"json nested", "jsonl", `{"ts":1767225600000,"kind":{"a":1},"account":"a"}`, `field "kind": bad field value: nested value`, specfile.ErrBadField},
		{"json duplicate", "jsonl", `{"ts":1767225600000,"kind":"k","kind":"j","account":"a"}`, `field "kind": malformed row: given twice`, specfile.ErrBadSyntax},
		{"json trailing", "jsonl", goodJSON + ` {}`, "trailing data", specfile.ErrBadSyntax},
		{"json huge line", "jsonl", `{"ts":1767225600000,"kind":"` + strings.Repeat("x", 2<<20) + `","account":"a"}`, "longer than", specfile.ErrBadSyntax},
		{"csv too few", "csv", "1767225600000,login", "2 columns, the header has 5", specfile.ErrBadSyntax},
		{"csv bad quote", "csv", `1767225600000,"log"in,a,,`, "malformed row", specfile.ErrBadSyntax},
		{"csv empty time", "csv", ",login,a1,,", `field "ts": missing field`, specfile.ErrMissingField},
		{"csv bad time", "csv", "soon,login,a1,,", `field "ts": unparseable time`, specfile.ErrBadTime},
		{"csv bad number", "csv", "1767225600000,login,a1,1.2.3,", `field "amount"`, specfile.ErrBadField},
		{"csv infinite", "csv", "1767225600000,login,a1,Inf,", `field "amount"`, specfile.ErrBadField},
	}
	s := schema(t)
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			path := filepath.Join(dir, "in."+c.ext)
			var text string
			if c.ext == "csv" {
				text = "ts,kind,account,amount,ok\n" + goodCSV + "\n" + c.bad + "\n" + goodCSV + "\n"
			} else {
				text = goodJSON + "\n" + c.bad + "\n" + goodJSON + "\n"
			}
			if err := os.WriteFile(path, []byte(text), 0o644); err != nil {
				t.Fatal(err)
			}
			line := "in." + c.ext + ":2:"
			if c.ext == "csv" {
				line = "in." + c.ext + ":3:"
			}
			var seen []*source.RowError
			r, err := source.Open([]string{path}, s, source.Options{MaxBadRows: 1, OnBadRow: func(e *source.RowError) { seen = append(seen, e) }}, nil, 0)
			if err != nil {
				t.Fatal(err)
			}
			evs := readAll(t, r, -1)
			r.Close()
			if len(evs) != 2 || r.BadRows() != 1 || len(seen) != 1 {
				t.Fatalf("%d events, %d bad rows, %d reported; want 2, 1, 1", len(evs), r.BadRows(), len(seen))
			}
			for _, ev := range evs {
				if ev.Fields[1].Str != "a1" {
					t.Fatalf("a bad row leaked into an event: %+v", ev)
				}
			}
			msg := seen[0].Error()
			if !strings.Contains(msg, line) || !strings.Contains(msg, c.want) || !errors.Is(seen[0], c.sentinel) {
				t.Errorf("message %q: want %q and %q, wrapping %v", msg, line, c.want, c.sentinel)
			}
			r, err = source.Open([]string{path}, s, source.Options{}, nil, 0)
			if err != nil {
				t.Fatal(err)
			}
			var stop error
			n := 0
			for _, err := range r.Events() {
				if err != nil {
					stop = err
					break
				}
				n++
			}
			r.Close()
			if !errors.Is(stop, source.ErrTooManyBadRows) || !strings.Contains(stop.Error(), line) || n != 1 {
				t.Errorf("with no tolerance: %d events then %v", n, stop)
			}
		})
	}
}

// TestBadFiles: problems with a whole file are errors at Open.
func TestBadFiles(t *testing.T) {
	dir := t.TempDir()
	s := schema(t)
	write := func(name, text string) string {
		p := filepath.Join(dir, name)
		os.WriteFile(p, []byte(text), 0o644)
		return p
	}
	for _, c := range []struct{ path, want string }{
		{write("nohdr.csv", ""), "empty CSV file"},
		{write("notime.csv", "kind,account\n"), `no "ts" column`},
		{write("noacct.csv", "ts,kind\n"), `no "account" column`},
		{write("twice.csv", "ts,kind,account,kind\n"), "appears twice"},
		{write("x.txt", ""), "unknown format"},
		{write("junk.parquet", "not parquet at all"), "junk.parquet"},
		{write("junk.jsonl.gz", "not gzip"), "junk.jsonl.gz"},
		{filepath.Join(dir, "missing.jsonl"), "no such file"},
	} {
		r, err := source.Open([]string{c.path}, s, source.Options{}, nil, 0)
		if err == nil {
			r.Close()
			t.Errorf("%s: opened", c.path)
			continue
		}
		if !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: %v, want %q", c.path, err, c.want)
		}
	}
}

// TestCursorMismatch: a cursor for other files, or at another event, is
// refused rather than silently misread.
func TestCursorMismatch(t *testing.T) {
	dir := t.TempDir()
	paths := fiveFiles(t, dir, 50)
	s := schema(t)
	opts := source.Options{MaxDisorder: 60e9, MaxBadRows: -1}
	r, _ := source.Open(paths, s, opts, nil, 0)
	readAll(t, r, 20)
	cur, _ := r.CursorAt(20)
	r.Close()
	for _, c := range []struct {
		paths []string
		cur   []byte
		seq   uint64
	}{
		{paths, cur, 19},
		{paths[:4], cur, 20},
		{append([]string{paths[1], paths[0]}, paths[2:]...), cur, 20},
		{paths, cur[:len(cur)-1], 20},
		{paths, append([]byte{9}, cur[1:]...), 20},
		{paths, nil, 20},
	} {
		r, err := source.Open(c.paths, s, opts, c.cur, c.seq)
		if err == nil {
			r.Close()
			t.Errorf("cursor accepted for %v at %d", c.paths, c.seq)
		} else if !errors.Is(err, source.ErrCursor) {
			t.Errorf("%v does not match ErrCursor", err)
		}
	}
}

// TestBadParquetRows: a Parquet row with a null required field or a
// non-finite number is rejected with the file and row number.
func TestBadParquetRows(t *testing.T) {
	type prow struct {
		TS      int64   `parquet:"ts"`
		Kind    string  `parquet:"kind"`
		Account *string `parquet:"account,optional"`
		Amount  float64 `parquet:"amount"`
	}
	a := "a1"
	rows := []prow{{1767225600000, "login", &a, 1}, {1767225600001, "login", nil, 1}, {1767225600002, "login", &a, math.Inf(1)}, {1767225600003, "login", &a, 2}}
	path := filepath.Join(t.TempDir(), "in.parquet")
	if err := parquet.WriteFile(path, rows); err != nil {
		t.Fatal(err)
	}
	var bad []string
	r, err := source.Open([]string{path}, schema(t), source.Options{MaxBadRows: -1, OnBadRow: func(e *source.RowError) { bad = append(bad, e.Error()) }}, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	evs := readAll(t, r, -1)
	if len(evs) != 2 || len(bad) != 2 ||
		!strings.Contains(bad[0], "in.parquet: row 1: field \"account\": missing field") ||
		!strings.Contains(bad[1], "in.parquet: row 2: field \"amount\": bad field value") {
		t.Fatalf("%d events; bad rows %q", len(evs), bad)
	}
}
