package sink_test

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward/sink"
	"github.com/tallyward/tallyward/specfile"
)

var cols = sink.Columns{
	Time: "ts",
	Fields: []specfile.Field{
		{Name: "account", Type: specfile.String},
		{Name: "amount", Type: specfile.Number},
		{Name: "ok", Type: specfile.Bool},
	},
	Features: []string{"account.n_1h", "account.mean"},
}

var awkward = []string{"plain", "with,comma", `with "quotes"`, "line\nbreak", " lead", "tab\there", "\x01ctl", "é✓", "bad\xffutf8", ""}

func genRows(n int) []sink.Row {
	rng := rand.New(rand.NewPCG(9, 9))
	rows := make([]sink.Row, n)
	for i := range rows {
		v := []float64{float64(rng.IntN(50)), rng.NormFloat64() * 1e3}
		if i%7 == 0 {
			v[1] = math.NaN()
		}
		ok := specfile.Value{Str: "false"}
		if i%2 == 0 {
			ok = specfile.Value{Str: "true", Num: 1}
		}
		rows[i] = sink.Row{Time: 1_767_225_600_000_000_000 + int64(i)*1_234_567,
			Fields: []specfile.Value{{Str: awkward[i%len(awkward)]}, {Num: float64(rng.IntN(100000)) / 100}, ok}, Values: v}
	}
	return rows
}

func write(t *testing.T, path string, format sink.Format, rows []sink.Row) {
	tb, err := sink.Open(path, format, cols, -1)
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range rows {
		if err := tb.Write(r); err != nil {
			t.Fatal(err)
		}
	}
	if err := tb.Close(); err != nil {
		t.Fatal(err)
	}
}

func sameFloat(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }

// TestTablesReadBack: CSV (read by encoding/csv), JSON lines (read by
// encoding/json) and Parquet (read by parquet-go) give back every value,
// awkward strings included.
func TestTablesReadBack(t *testing.T) {
	rows := genRows(2500) // more than one conversion batch
	dir := t.TempDir()

	write(t, filepath.Join(dir, "t.csv"), sink.CSV, rows)
	f, _ := os.Open(filepath.Join(dir, "t.csv"))
	recs, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil || len(recs) != len(rows)+1 {
		t.Fatalf("csv: %d records, %v", len(recs), err)
	}
	for i, r := range rows {
		rec := recs[i+1]
		want := r.Fields[0].Str
		if want == "bad\xffutf8" {
			want = "bad\xffutf8" // CSV keeps bytes as they are
		}
		if rec[0] != specfile.FormatTime(r.Time) || rec[1] != want || rec[3] != r.Fields[2].Str {
			t.Fatalf("csv row %d: %q", i, rec)
		}
		for j, v := range r.Values {
			got := math.NaN()
			if rec[4+j] != "" {
				got, _ = strconv.ParseFloat(rec[4+j], 64)
			}
			if !sameFloat(got, v) {
				t.Fatalf("csv row %d feature %d: %q, want %v", i, j, rec[4+j], v)
			}
		}
	}

	write(t, filepath.Join(dir, "t.jsonl"), sink.JSONLines, rows)
	data, _ := os.ReadFile(filepath.Join(dir, "t.jsonl"))
	lines := bytes.Split(bytes.TrimSuffix(data, []byte("\n")), []byte("\n"))
	if len(lines) != len(rows) {
		t.Fatalf("jsonl: %d lines", len(lines))
	}
	for i, r := range rows {
		var m map[string]any
		if err := json.Unmarshal(lines[i], &m); err != nil {
			t.Fatalf("jsonl line %d: %v: %s", i, err, lines[i])
		}
		want := r.Fields[0].Str
		if want == "bad\xffutf8" {
			want = "bad\ufffdutf8" // as encoding/json writes invalid UTF-8
		}
		if m["account"] != want || m["amount"] != r.Fields[1].Num || m["ok"] != (r.Fields[2].Num == 1) || m["ts"] != specfile.FormatTime(r.Time) {
			t.Fatalf("jsonl line %d: %v", i, m)
		}
		for j, n := range cols.Features {
			got, ok := m[n].(float64)
			if !ok {
				got = math.NaN()
			}
			if !sameFloat(got, r.Values[j]) {
				t.Fatalf("jsonl line %d %s: %v, want %v", i, n, m[n], r.Values[j])
			}
		}
	}

	pq := filepath.Join(dir, "t.parquet")
	write(t, pq, sink.Parquet, rows)
	if _, err := os.Stat(pq + ".rows"); !os.IsNotExist(err) {
		t.Errorf("staging file left behind: %v", err)
	}
	type prow struct {
		TS      int64   `parquet:"ts"`
		Account string  `parquet:"account"`
		Amount  float64 `parquet:"amount"`
		OK      bool    `parquet:"ok"`
		N       float64 `parquet:"account.n_1h"`
		Mean    float64 `parquet:"account.mean"`
	}
	got, err := parquet.ReadFile[prow](pq)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != len(rows) {
		t.Fatalf("parquet: %d rows", len(got))
	}
	for i, r := range rows {
		g := got[i]
		if g.TS != r.Time || g.Account != r.Fields[0].Str || g.Amount != r.Fields[1].Num || g.OK != (r.Fields[2].Num == 1) ||
			!sameFloat(g.N, r.Values[0]) || !sameFloat(g.Mean, r.Values[1]) {
			t.Fatalf("parquet row %d: %+v, want %+v", i, g, r)
		}
	}
}

// TestResumeAtCommittedLength: a table abandoned after a commit and some
// uncommitted rows, reopened at the committed length and given the rows
// after the commit, ends byte for byte like one written in one go.
func TestResumeAtCommittedLength(t *testing.T) {
	rows := genRows(500)
	for _, c := range []struct {
		name   string
		format sink.Format
	}{{"t.csv", sink.CSV}, {"t.jsonl", sink.JSONLines}, {"t.parquet", sink.Parquet}} {
		dir := t.TempDir()
		ref := filepath.Join(dir, "ref-"+c.name)
		write(t, ref, c.format, rows)
		path := filepath.Join(dir, c.name)
		tb, err := sink.Open(path, c.format, cols, -1)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range rows[:200] {
			tb.Write(r)
		}
		n, err := tb.Commit()
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range rows[200:350] {
			tb.Write(r) // lost in the "crash", partly flushed
		}
		tb2, err := sink.Open(path, c.format, cols, n)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range rows[200:] {
			tb2.Write(r)
		}
		if err := tb2.Close(); err != nil {
			t.Fatal(err)
		}
		a, _ := os.ReadFile(ref)
		b, _ := os.ReadFile(path)
		if !bytes.Equal(a, b) {
			t.Errorf("%s: resumed table differs (%d vs %d bytes)", c.name, len(b), len(a))
		}
		// A run after the table was finished finds nothing to do.
		if c.format == sink.Parquet {
			tb3, err := sink.Open(path, c.format, cols, n+1)
			if err != nil {
				t.Fatal(err)
			}
			if err := tb3.Close(); err != nil {
				t.Fatal(err)
			}
			if b2, _ := os.ReadFile(path); !bytes.Equal(a, b2) {
				t.Errorf("a finished Parquet table changed")
			}
		}
	}
	if _, err := sink.Open(filepath.Join(t.TempDir(), "missing.csv"), sink.CSV, cols, 10); err == nil {
		t.Errorf("resumed a missing table")
	}
}
