package report

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/tallyward/tallyward/sketch"
)

// The quick report is what CI runs: it must be produced, and every error
// figure must be inside the bound its table names (the bounds and their
// sources are on each table; see accuracy.go).
func TestQuickReportInsideBounds(t *testing.T) {
	r, err := Accuracy(Config{Quick: true})
	if err != nil {
		t.Fatal(err)
	}
	for _, o := range r.Outside() {
		t.Error(o)
	}
	dir := t.TempDir()
	if err := r.Write(dir); err != nil {
		t.Fatal(err)
	}
	md, err := os.ReadFile(filepath.Join(dir, "report.md"))
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range r.Plots {
		st, err := os.Stat(filepath.Join(dir, f.File))
		if err != nil || st.Size() == 0 {
			t.Errorf("plot %s not written: %v", f.File, err)
		}
		if !bytes.Contains(md, []byte("("+f.File+")")) {
			t.Errorf("report.md does not show %s", f.File)
		}
	}
	checked := 0
	for _, tb := range r.Tables {
		if tb.Checked {
			checked++
			if tb.Bound == "" || tb.Source == "" {
				t.Errorf("table %q names no bound or source", tb.Title)
			}
		}
		if len(tb.Rows) == 0 {
			t.Errorf("table %q is empty", tb.Title)
		}
	}
	if checked < 6 {
		t.Errorf("%d checked tables, want at least 6", checked)
	}
}

// userRows is a seeded stand-in for a user's file: Zipf keys, items
// shared across keys, lognormal values and increasing times on most rows.
func userRows(n int) []Row {
	rng := rand.New(rand.NewPCG(7, 7))
	zk := rand.NewZipf(rng, 1.1, 1, 2000)
	zi := rand.NewZipf(rng, 1.05, 1, 50000)
	rows := make([]Row, n)
	for i := range rows {
		r := Row{Key: fmt.Sprintf("shop-%d", zk.Uint64()), Item: fmt.Sprintf("card-%d", zi.Uint64())}
		if i%5 != 0 {
			r.Value, r.HasValue = math.Round(math.Exp(rng.NormFloat64()+3)*100)/100, true
		}
		if i%7 != 0 {
			r.Time, r.HasTime = 1_780_000_000_000_000_000+int64(i)*1_000_000, true
		}
		rows[i] = r
	}
	return rows
}

func writeCSV(t *testing.T, rows []Row) string {
	var b strings.Builder
	b.WriteString("key,item,value,time\n")
	for _, r := range rows {
		v, tm := "", ""
		if r.HasValue {
			v = fmt.Sprint(r.Value)
		}
		if r.HasTime {
			tm = fmt.Sprint(r.Time)
		}
		fmt.Fprintf(&b, "%s,%s,%s,%s\n", r.Key, r.Item, v, tm)
	}
	path := filepath.Join(t.TempDir(), "rows.csv")
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// The report on a file equals the report computed from the same rows
// through the API, and its figures equal a recomputation with package
// sketch and exact sets.
func TestFileReportEqualsLibrary(t *testing.T) {
	rows := userRows(60_000)
	path := writeCSV(t, rows)
	out := t.TempDir()
	var stdout, stderr bytes.Buffer
	if code := Main(RunOptions{Input: path, Out: out}, &stdout, &stderr); code != 0 {
		t.Fatalf("exit %d: %s%s", code, stdout.String(), stderr.String())
	}
	got, err := os.ReadFile(filepath.Join(out, "report.md"))
	if err != nil {
		t.Fatal(err)
	}
	want, err := FromRows(rows, UserParams{})
	if err != nil {
		t.Fatal(err)
	}
	// The machine note (load, duration) is the one line that may differ.
	strip := func(s string) string {
		var keep []string
		for _, l := range strings.Split(s, "\n\n") {
			if !strings.HasPrefix(l, "Machine: ") {
				keep = append(keep, l)
			}
		}
		return strings.Join(keep, "\n\n")
	}
	if strip(string(got)) != strip(want.Markdown()) {
		t.Fatalf("report on the file differs from the report on the rows:\n--- file\n%s\n--- rows\n%s", got, want.Markdown())
	}

	// Independent recomputation of the first distinct row and the quantile row.
	exact := map[string]map[string]bool{}
	ever := map[string]*sketch.DistinctEver{}
	newest := map[string]int64{}
	var vals []float64
	for i, r := range rows {
		if exact[r.Key] == nil {
			exact[r.Key] = map[string]bool{}
			ever[r.Key], _ = sketch.NewDistinctEver(sketch.DistinctEverSpec{})
		}
		exact[r.Key][r.Item] = true
		tm := int64(i + 1)
		if r.HasTime {
			tm = r.Time
		}
		ever[r.Key].Add(tm, sketch.HashString(r.Item))
		newest[r.Key] = max(newest[r.Key], tm)
		if r.HasValue {
			vals = append(vals, r.Value)
		}
	}
	var errsRel []float64
	largest := 0
	for k, set := range exact {
		largest = max(largest, len(set))
		errsRel = append(errsRel, relErr(float64(ever[k].DistinctAt(newest[k])), float64(len(set))))
	}
	s := summarize(errsRel)
	dt := want.Table("Distinct items per key")
	row := dt.Rows[0]
	if row[1] != fmt.Sprint(len(exact)) || row[2] != fmt.Sprint(largest) || row[3] != fmtFloat(s.Mean) || row[6] != fmtFloat(s.Max) {
		t.Errorf("distinct row %v; recomputed keys %d largest %d mean %s max %s", row, len(exact), largest, fmtFloat(s.Mean), fmtFloat(s.Max))
	}
	q, _ := sketch.NewQuantile(sketch.QuantileParams{})
	for _, v := range vals {
		q.Add(v)
	}
	sorted := slices.Sorted(slices.Values(vals))
	est, _ := q.Value(0.99)
	exact99 := sorted[int(math.Floor(0.99*float64(len(sorted)-1)))]
	qrow := want.Table("Quantiles: relative error against alpha").Rows[0]
	if qrow[5] != fmtFloat(relErr(est, exact99)) {
		t.Errorf("p99 cell %s, recomputed %s", qrow[5], fmtFloat(relErr(est, exact99)))
	}
	if out := want.Outside(); len(out) > 0 {
		t.Errorf("figures outside their bound on generated user rows: %v", out)
	}
}

// Bad rows give ErrBadRow naming each line, all at once; nothing panics.
func TestReadRowsReportsEveryBadRow(t *testing.T) {
	in := "key,item,value,time\na,x,1.5,2026-03-01T00:00:00Z\nb\nc,y,NaN\nd,z,,yesterday\ne,w,2,5\n"
	_, err := ReadRows(strings.NewReader(in))
	if !errors.Is(err, ErrBadRow) {
		t.Fatalf("err %v, want ErrBadRow", err)
	}
	for _, line := range []string{"line 3", "line 4", "line 5"} {
		if !strings.Contains(err.Error(), line) {
			t.Errorf("error does not name %s: %v", line, err)
		}
	}
	rows, err := ReadRows(strings.NewReader("a,x\nb,y,3\nc,z,4,1000\n"))
	if err != nil || len(rows) != 3 || rows[2].Time != 1000 || !rows[1].HasValue || rows[0].HasValue {
		t.Fatalf("rows %+v err %v", rows, err)
	}
}

func FuzzReadRows(f *testing.F) {
	f.Add("key,item\na,b\n")
	f.Add("a,b,1,2\n\"x,\"y\n")
	f.Add("a,b,1e400,2026-01-01T00:00:00Z\n")
	f.Fuzz(func(t *testing.T, s string) {
		rows, err := ReadRows(strings.NewReader(s))
		if err != nil && !errors.Is(err, ErrBadRow) {
			t.Fatalf("error %v does not wrap ErrBadRow", err)
		}
		if err == nil && len(rows) > 0 {
			if _, err := FromRows(rows, UserParams{}); err != nil {
				t.Fatal(err)
			}
		}
	})
}
