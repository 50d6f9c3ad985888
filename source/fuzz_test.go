package source_test

import (
	"errors"
	"os"
	"path/filepath"
	"testing"

	"github.com/tallyward/tallyward/source"
)

// FuzzCSVFile: no CSV file makes the reader panic or loop; every rejected
// row is a *RowError naming the file and a line; positions only advance.
func FuzzCSVFile(f *testing.F) {
	f.Add([]byte("ts,kind,account,amount,ok\n1767225600000,login,a1,2.5,true\n"))
	f.Add([]byte("ts,kind,account\n\"1\",\"a\nb\",c\n1,\"x\"y,z\n"))
	f.Add([]byte("\ufeffts,kind,account,amount\n1,k,a,\n2,k,a,NaN\n,,,\n"))
	f.Add([]byte("ts,kind,account\n1,2\n1,2,3,4\n"))
	s := schema(f)
	f.Fuzz(func(t *testing.T, data []byte) {
		path := filepath.Join(t.TempDir(), "f.csv")
		if err := os.WriteFile(path, data, 0o644); err != nil {
			t.Fatal(err)
		}
		var bad []*source.RowError
		r, err := source.Open([]string{path}, s, source.Options{MaxBadRows: -1, SortFiles: true,
			OnBadRow: func(e *source.RowError) { bad = append(bad, e) }}, nil, 0)
		if err != nil {
			return // a file-level problem (no header, missing column)
		}
		defer r.Close()
		n := 0
		for _, err := range r.Events() {
			if err != nil {
				t.Fatalf("read error %v", err)
			}
			if n++; n > len(data)+1 {
				t.Fatalf("more events than bytes")
			}
		}
		for _, e := range bad {
			var re *source.RowError
			if !errors.As(e, &re) || re.File != path {
				t.Fatalf("bad row error %v", e)
			}
		}
		if int64(len(bad)) != r.BadRows() {
			t.Fatalf("%d reported, %d counted", len(bad), r.BadRows())
		}
	})
}

// FuzzCursor: a damaged cursor is refused with ErrCursor, never a panic.
func FuzzCursor(f *testing.F) {
	dir := f.TempDir()
	paths := fiveFiles(f, dir, 30)
	s := schema(f)
	opts := source.Options{MaxDisorder: 60e9, MaxBadRows: -1}
	r, err := source.Open(paths, s, opts, nil, 0)
	if err != nil {
		f.Fatal(err)
	}
	readAll(f, r, 40)
	cur, _ := r.CursorAt(40)
	r.Close()
	f.Add(cur, uint64(40))
	f.Add([]byte{1, 0, 0}, uint64(0))
	f.Fuzz(func(t *testing.T, cur []byte, seq uint64) {
		r, err := source.Open(paths, s, opts, cur, seq)
		if err != nil {
			return
		}
		defer r.Close()
		for _, err := range r.Events() {
			if err != nil {
				return
			}
		}
	})
}
