package report

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/vg"
)

// Report is a set of tables and plots, rendered as one Markdown page
// (Markdown) with its PNG plots beside it (Write).
type Report struct {
	Title string
	// Notes are paragraphs printed under the title: the machine, the
	// seeds, the sizes.
	Notes  []string
	Tables []*Table
	Plots  []*Figure
}

// Table is one measured figure set, compared with a published bound.
type Table struct {
	Title string
	// Measures says what the rows measure, in a sentence or two.
	Measures string
	// Bound states the published bound the rows are compared with, and
	// Source cites where it comes from (author, year, title).
	Bound, Source string
	Header        []string
	Rows          [][]string
	// Outside lists every row whose figure is outside its bound, as a
	// sentence naming the row. Empty means every figure is inside.
	Outside []string
	// Checked is false for tables that carry no bound (sizes, speed).
	Checked bool
}

// Figure is one PNG plot of the report.
type Figure struct {
	File, Caption string
	Plot          *plot.Plot
	// Width and Height in inches; zero means 7 by 4.
	Width, Height float64
}

func (t *Table) add(cells ...any) {
	row := make([]string, len(cells))
	for i, c := range cells {
		switch v := c.(type) {
		case string:
			row[i] = v
		case float64:
			row[i] = fmtFloat(v)
		case int:
			row[i] = fmt.Sprint(v)
		case uint64:
			row[i] = fmt.Sprint(v)
		case bool:
			row[i] = yes(v)
		default:
			row[i] = fmt.Sprint(v)
		}
	}
	t.Rows = append(t.Rows, row)
}

// check records a row outside its bound when ok is false.
func (t *Table) check(ok bool, format string, args ...any) bool {
	if !ok {
		t.Outside = append(t.Outside, t.Title+": "+fmt.Sprintf(format, args...))
	}
	return ok
}

func yes(b bool) string {
	if b {
		return "yes"
	}
	return "**no**"
}

// fmtFloat prints a figure with four significant digits.
func fmtFloat(v float64) string {
	switch {
	case math.IsNaN(v):
		return "-"
	case v == 0:
		return "0"
	case math.Abs(v) >= 1e6 || math.Abs(v) < 1e-4:
		return fmt.Sprintf("%.3e", v)
	default:
		return fmt.Sprintf("%.4g", v)
	}
}

// Outside returns every row of every table that is outside its bound.
func (r *Report) Outside() []string {
	var out []string
	for _, t := range r.Tables {
		out = append(out, t.Outside...)
	}
	return out
}

// Table returns the table with the given title, or nil.
func (r *Report) Table(title string) *Table {
	for _, t := range r.Tables {
		if t.Title == title {
			return t
		}
	}
	return nil
}

// Markdown renders the page: title, notes, a summary of bounds, then each
// table with what it measures, its bound and source, and the plots.
func (r *Report) Markdown() string {
	var b strings.Builder
	fmt.Fprintf(&b, "# %s\n\n", r.Title)
	for _, n := range r.Notes {
		fmt.Fprintf(&b, "%s\n\n", n)
	}
	checked := 0
	for _, t := range r.Tables {
		if t.Checked {
			checked++
		}
	}
	if out := r.Outside(); len(out) == 0 {
		fmt.Fprintf(&b, "Every error figure of the %d checked tables is inside its published bound.\n\n", checked)
	} else {
		fmt.Fprintf(&b, "%d figures are outside their bound:\n\n", len(out))
		for _, o := range out {
			fmt.Fprintf(&b, "- %s\n", o)
		}
		b.WriteString("\n")
	}
	for _, t := range r.Tables {
		fmt.Fprintf(&b, "## %s\n\n", t.Title)
		if t.Measures != "" {
			fmt.Fprintf(&b, "%s\n\n", t.Measures)
		}
		if t.Bound != "" {
			fmt.Fprintf(&b, "Bound: %s\n\n", t.Bound)
		}
		if t.Source != "" {
			fmt.Fprintf(&b, "Source: %s\n\n", t.Source)
		}
		b.WriteString("| " + strings.Join(t.Header, " | ") + " |\n")
		b.WriteString("|" + strings.Repeat("---|", len(t.Header)) + "\n")
		for _, row := range t.Rows {
			b.WriteString("| " + strings.Join(row, " | ") + " |\n")
		}
		b.WriteString("\n")
		if t.Checked {
			if len(t.Outside) == 0 {
				b.WriteString("Inside the bound: every row.\n\n")
			} else {
				fmt.Fprintf(&b, "Outside the bound: %s.\n\n", strings.Join(t.Outside, "; "))
			}
		}
	}
	for _, f := range r.Plots {
		fmt.Fprintf(&b, "## Plot: %s\n\n![%s](%s)\n\n", f.Caption, f.Caption, f.File)
	}
	return b.String()
}

// Write writes report.md and every plot as PNG into dir, creating it.
func (r *Report) Write(dir string) error {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return err
	}
	for _, f := range r.Plots {
		w, h := f.Width, f.Height
		if w == 0 {
			w, h = 7, 4
		}
		if err := f.Plot.Save(vg.Length(w)*vg.Inch, vg.Length(h)*vg.Inch, filepath.Join(dir, f.File)); err != nil {
			return fmt.Errorf("plot %s: %w", f.File, err)
		}
	}
	return os.WriteFile(filepath.Join(dir, "report.md"), []byte(r.Markdown()), 0o644)
}

// summary is the mean, median, 99th percentile and maximum of a sample.
type summary struct {
	N                   int
	Mean, P50, P99, Max float64
}

// summarize sorts xs in place and summarizes it; quantiles are gonum's
// empirical quantiles.
func summarize(xs []float64) summary {
	if len(xs) == 0 {
		return summary{Mean: math.NaN(), P50: math.NaN(), P99: math.NaN(), Max: math.NaN()}
	}
	slices.Sort(xs)
	return summary{
		N:    len(xs),
		Mean: stat.Mean(xs, nil),
		P50:  stat.Quantile(0.5, stat.Empirical, xs, nil),
		P99:  stat.Quantile(0.99, stat.Empirical, xs, nil),
		Max:  xs[len(xs)-1],
	}
}

// relErr is |est-exact|/exact, and |est| when exact is 0.
func relErr(est, exact float64) float64 {
	if exact == 0 {
		return math.Abs(est)
	}
	return math.Abs(est-exact) / math.Abs(exact)
}

// rms is the root mean square of xs.
func rms(xs []float64) float64 {
	var s float64
	for _, x := range xs {
		s += x * x
	}
	return math.Sqrt(s / float64(max(len(xs), 1)))
}

// allowedRMS is the largest root-mean-square relative error consistent
// with a standard error sigma when the sample rests on k independent
// streams: sigma * (1 + 3/sqrt(2k)). The sample RMS of k normal errors has
// a relative standard deviation of about 1/sqrt(2k) (chi distribution,
// from memory); three of them is common practice for a test that should
// not fail by chance.
func allowedRMS(sigma float64, k int) float64 {
	return sigma * (1 + 3/math.Sqrt(2*float64(max(k, 1))))
}
