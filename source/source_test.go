package source_test

import (
	"bytes"
	"compress/gzip"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/klauspost/compress/zstd"
	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward/source"
	"github.com/tallyward/tallyward/specfile"
)

const specText = `version: 1
events:
  time: {field: ts, format: unix_ms}
  fields:
    - {name: kind, type: string}
    - {name: account, type: string}
    - {name: amount, type: number, optional: true}
    - {name: ok, type: bool, optional: true}
run: {max_disorder: 1m}
entities:
  - name: account
    key: account
    features:
      - {name: n, kind: sliding_count, window: 1h}
`

func schema(t testing.TB) *specfile.Schema {
	f, err := specfile.Parse("s.yaml", []byte(specText))
	if err != nil {
		t.Fatal(err)
	}
	return f.Schema
}

// rec is a generated row; the same rows are written in every format.
type rec struct {
	TS      int64   `parquet:"ts"`
	Kind    string  `parquet:"kind"`
	Account string  `parquet:"account"`
	Amount  float64 `parquet:"amount"`
	OK      bool    `parquet:"ok"`
}

// genRows draws n rows whose times are out of order by up to 50 s (within
// the spec's 1 m).
func genRows(rng *rand.Rand, n int, t0 int64) []rec {
	out := make([]rec, n)
	t := t0
	for i := range out {
		t += rng.Int64N(3000)
		out[i] = rec{TS: t - rng.Int64N(50_000), Kind: []string{"login", "pay", "signup"}[rng.IntN(3)],
			Account: fmt.Sprintf("a%d", rng.IntN(50)), Amount: float64(rng.IntN(10000)) / 100, OK: rng.IntN(2) == 0}
	}
	return out
}

func jsonLine(r rec) string {
	return fmt.Sprintf(`{"ts":%d,"kind":%q,"account":%q,"amount":%v,"ok":%v}`, r.TS, r.Kind, r.Account, r.Amount, r.OK)
}

func csvLine(r rec) string {
	return fmt.Sprintf("%d,%s,%s,%v,%v", r.TS, r.Kind, r.Account, r.Amount, r.OK)
}

func writeFile(t testing.TB, path string, rows []rec, extra map[int]string) {
	t.Helper()
	format, comp, err := source.FormatOf(path)
	if err != nil {
		t.Fatal(err)
	}
	if format == source.Parquet {
		if err := parquet.WriteFile(path, rows); err != nil {
			t.Fatal(err)
		}
		return
	}
	var b bytes.Buffer
	if format == source.CSV {
		b.WriteString("ts,kind,account,amount,ok\n")
	}
	for i, r := range rows {
		if x, ok := extra[i]; ok {
			b.WriteString(x + "\n")
		}
		if format == source.CSV {
			b.WriteString(csvLine(r) + "\n")
		} else {
			b.WriteString(jsonLine(r) + "\n")
		}
	}
	data := b.Bytes()
	switch comp {
	case source.Gzip:
		var z bytes.Buffer
		w := gzip.NewWriter(&z)
		w.Write(data)
		w.Close()
		data = z.Bytes()
	case source.Zstd:
		w, _ := zstd.NewWriter(nil)
		data = w.EncodeAll(data, nil)
	}
	if err := os.WriteFile(path, data, 0o644); err != nil {
		t.Fatal(err)
	}
}

func readAll(t testing.TB, r *source.Reader, limit int) []specfile.Event {
	t.Helper()
	var out []specfile.Event
	for ev, err := range r.Events() {
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, ev)
		if len(out) == limit {
			break
		}
	}
	return out
}

// fiveFiles writes the same kind of traffic in every format and
// compression, with a bad row here and there.
func fiveFiles(t testing.TB, dir string, n int) []string {
	rng := rand.New(rand.NewPCG(7, 8))
	names := []string{"a.jsonl", "b.csv.gz", "c.parquet", "d.ndjson.zst", "e.csv"}
	var paths []string
	for i, name := range names {
		p := filepath.Join(dir, name)
		bad := map[int]string{}
		if !strings.HasSuffix(name, ".parquet") {
			for j := 0; j < 3; j++ {
				if strings.Contains(name, "csv") {
					bad[rng.IntN(n)] = "1,too,few"
				} else {
					bad[rng.IntN(n)] = `{"ts": "later", "kind": "x", "account": "y"}`
				}
			}
		}
		writeFile(t, p, genRows(rng, n, 1_767_225_600_000+int64(i)*1000), bad)
		paths = append(paths, p)
	}
	return paths
}

func sameEvents(t *testing.T, got, want []specfile.Event) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%d events, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i].Time != want[i].Time || !slices.Equal(got[i].Fields, want[i].Fields) {
			t.Fatalf("event %d: %+v, want %+v", i, got[i], want[i])
		}
	}
}

// TestResumeFromCursorEqualsOneRead: a reader stopped after k events and
// reopened on the cursor of an earlier event r (a commit's resume point)
// yields exactly the events from r on of one uninterrupted read, with the
// same bad-row count, for every format and compression at once.
func TestResumeFromCursorEqualsOneRead(t *testing.T) {
	for _, sorted := range []bool{false, true} {
		t.Run(map[bool]string{false: "streamed", true: "sorted"}[sorted], func(t *testing.T) {
			testResume(t, sorted)
		})
	}
}

func testResume(t *testing.T, sorted bool) {
	n := 3000
	if testing.Short() {
		n = 600
	}
	dir := t.TempDir()
	paths := fiveFiles(t, dir, n)
	s := schema(t)
	opts := source.Options{MaxDisorder: 60e9, MaxBadRows: -1, SortFiles: sorted}
	r, err := source.Open(paths, s, opts, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	all := readAll(t, r, -1)
	totalBad := r.BadRows()
	r.Close()
	if len(all) != 5*n || totalBad != 12 {
		t.Fatalf("%d events and %d bad rows, want %d and 12", len(all), totalBad, 5*n)
	}
	rng := rand.New(rand.NewPCG(3, 4))
	for trial := 0; trial < 12; trial++ {
		k := rng.IntN(len(all) + 1)
		resume := uint64(k - rng.IntN(min(k, 200)+1))
		r, err := source.Open(paths, s, opts, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		readAll(t, r, k)
		if k == 0 {
			resume = 0
		}
		cur, err := r.CursorAt(resume)
		if err != nil {
			t.Fatal(err)
		}
		r.Close()
		r2, err := source.Open(paths, s, opts, cur, resume)
		if err != nil {
			t.Fatal(err)
		}
		rest := readAll(t, r2, -1)
		sameEvents(t, rest, all[resume:])
		if r2.BadRows() != totalBad {
			t.Fatalf("trial %d: %d bad rows after resuming, want %d", trial, r2.BadRows(), totalBad)
		}
		r2.Close()
	}
}

// TestMergeOfSortedFilesIsStableSort: sorted files merge into the stable
// sort of their concatenation by time (ties to the file given first).
func TestMergeOfSortedFilesIsStableSort(t *testing.T) {
	dir := t.TempDir()
	rng := rand.New(rand.NewPCG(1, 1))
	var paths []string
	var want []rec
	for i, name := range []string{"x.jsonl", "y.csv", "z.parquet"} {
		rows := genRows(rng, 500, 1_767_225_600_000)
		for j := range rows {
			rows[j].TS = rows[j].TS / 10000 * 10000 // many ties
		}
		slices.SortStableFunc(rows, func(a, b rec) int { return int(a.TS - b.TS) })
		p := filepath.Join(dir, name)
		writeFile(t, p, rows, nil)
		paths = append(paths, p)
		want = append(want, rows...)
		_ = i
	}
	slices.SortStableFunc(want, func(a, b rec) int { return int(a.TS - b.TS) })
	r, err := source.Open(paths, schema(t), source.Options{}, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	got := readAll(t, r, -1)
	if len(got) != len(want) {
		t.Fatalf("%d events, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i].Time != want[i].TS*1e6 || got[i].Fields[1].Str != want[i].Account || got[i].Fields[2].Num != want[i].Amount {
			t.Fatalf("event %d: %+v, want %+v", i, got[i], want[i])
		}
	}
}

// TestDisorderNamesFileAndRow, and SortFiles reads such a file anyway.
func TestDisorderNamesFileAndRow(t *testing.T) {
	dir := t.TempDir()
	rows := genRows(rand.New(rand.NewPCG(2, 2)), 100, 1_767_225_600_000)
	rows[60].TS = rows[59].TS - 120_000 // 2 minutes behind; 1 m allowed
	for _, name := range []string{"late.jsonl", "late.csv", "late.parquet"} {
		p := filepath.Join(dir, name)
		writeFile(t, p, rows, nil)
		r, err := source.Open([]string{p}, schema(t), source.Options{MaxDisorder: 60e9}, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		var got error
		for _, err := range r.Events() {
			if err != nil {
				got = err
			}
		}
		r.Close()
		var de *source.DisorderError
		if !errors.As(got, &de) || !errors.Is(got, source.ErrDisorder) || de.Row != 60 {
			t.Fatalf("%s: got %v, want a DisorderError at row 60", name, got)
		}
		wantLine := "late.parquet: row 60"
		if !strings.HasSuffix(name, ".parquet") {
			line := 61
			if strings.HasSuffix(name, ".csv") {
				line = 62 // the header is line 1
			}
			wantLine = fmt.Sprintf("%s:%d:", name, line)
		}
		if !strings.Contains(got.Error(), wantLine) {
			t.Errorf("%q does not name %q", got, wantLine)
		}
		r, err = source.Open([]string{p}, schema(t), source.Options{MaxDisorder: 60e9, SortFiles: true}, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		evs := readAll(t, r, -1)
		r.Close()
		if len(evs) != 100 || !slices.IsSortedFunc(evs, func(a, b specfile.Event) int { return int(a.Time - b.Time) }) {
			t.Errorf("%s: SortFiles gave %d events, sorted: %v", name, len(evs), slices.IsSortedFunc(evs, func(a, b specfile.Event) int { return int(a.Time - b.Time) }))
		}
	}
}

// TestParquetTimestampColumn: a time column annotated TIMESTAMP is read
// by its unit, whatever the spec's time format says (here rfc3339).
func TestParquetTimestampColumn(t *testing.T) {
	type row struct {
		TS      time.Time `parquet:"ts,timestamp(microsecond)"`
		Kind    string    `parquet:"kind"`
		Account string    `parquet:"account"`
	}
	at := time.Date(2026, 3, 1, 12, 0, 0, 123456000, time.UTC)
	p := filepath.Join(t.TempDir(), "ts.parquet")
	if err := parquet.WriteFile(p, []row{{at, "login", "a1"}, {at.Add(time.Second), "login", "a2"}}); err != nil {
		t.Fatal(err)
	}
	f, err := specfile.Parse("s.yaml", []byte(strings.Replace(specText, "format: unix_ms", "format: rfc3339", 1)))
	if err != nil {
		t.Fatal(err)
	}
	r, err := source.Open([]string{p}, f.Schema, source.Options{}, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	evs := readAll(t, r, -1)
	if len(evs) != 2 || evs[0].Time != at.UnixNano() || evs[1].Time != at.Add(time.Second).UnixNano() {
		t.Fatalf("got %+v, want times %d and +1s", evs, at.UnixNano())
	}
}
