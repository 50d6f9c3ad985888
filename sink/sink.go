// Package sink writes feature tables: one row per event with its time,
// chosen event fields and every feature, as CSV, JSON lines or Parquet.
//
// Exactly-once: Table.Commit makes every row written so far durable and
// returns the table's committed length. Stored in the pipeline's cursor
// (tallyward.Pipeline.SetCommitHook calls it inside each commit, before
// the state batch), that length lets a restarted run reopen the table
// truncated to exactly the rows the stored state covers and carry on, so
// the finished file is byte for byte the file of an uninterrupted run.
//
//   - CSV and JSON lines are written in place; the committed length is
//     the file's length, and a resumed run truncates the file to it.
//   - Parquet cannot be appended to, so rows are staged in PATH.rows (a
//     simple append-only row log, truncated the same way) and written as
//     Parquet to PATH when the table is closed at the end of the run, via
//     a temporary file and a rename; the staging file is then removed.
//
// Values: times are RFC 3339 with nanoseconds in UTC in CSV and JSON
// lines, and Parquet TIMESTAMP(NANOS) integers; features are float64
// (shortest round-trip text in CSV and JSON lines, where NaN is an empty
// cell or null; NaN itself in Parquet).
//
// Not for: appending to tables written by other tools. A Table is not
// safe for concurrent use.
package sink

import (
	"bufio"
	"errors"
	"fmt"
	"math"
	"os"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/tallyward/tallyward/specfile"
)

// Format is a table format.
type Format uint8

const (
	CSV Format = iota
	JSONLines
	Parquet
)

// FormatOf tells a table's format from its file name (.csv, .jsonl or
// .ndjson, .parquet).
func FormatOf(path string) (Format, error) {
	name := strings.ToLower(path)
	switch {
	case strings.HasSuffix(name, ".csv"):
		return CSV, nil
	case strings.HasSuffix(name, ".jsonl"), strings.HasSuffix(name, ".ndjson"):
		return JSONLines, nil
	case strings.HasSuffix(name, ".parquet"):
		return Parquet, nil
	}
	return 0, fmt.Errorf("sink: %s: unknown table format (want .csv, .jsonl, .ndjson or .parquet)", path)
}

// Columns are a table's columns: the time, event fields, then features.
type Columns struct {
	Time     string           // name of the time column
	Fields   []specfile.Field // event fields copied into each row
	Features []string         // feature names, "entity.feature"
}

func (c Columns) validate() error {
	seen := map[string]bool{c.Time: true}
	for _, n := range append(fieldNames(c.Fields), c.Features...) {
		if seen[n] {
			return fmt.Errorf("sink: column %q appears twice", n)
		}
		seen[n] = true
	}
	return nil
}

func fieldNames(fs []specfile.Field) []string {
	out := make([]string, len(fs))
	for i, f := range fs {
		out[i] = f.Name
	}
	return out
}

// Row is one table row. Fields holds one value per Columns.Fields.
type Row struct {
	Time   int64
	Fields []specfile.Value
	Values []float64
}

// Table is a feature table being written.
type Table interface {
	// Write appends a row.
	Write(r Row) error
	// Commit makes every row written so far durable and returns the
	// committed length to store in the pipeline's cursor.
	Commit() (int64, error)
	// Close finishes the table. Call it once the run is complete and its
	// last commit is durable; a run that stops early just stops (its next
	// run resumes from the committed length).
	Close() error
}

// ErrResume is returned when a table cannot be resumed at the committed
// length (the file is missing or shorter).
var ErrResume = errors.New("sink: cannot resume table")

// Open opens a table at path. committed < 0 starts a new table (an
// existing file is replaced); otherwise it is the length stored by the
// last commit of an interrupted run, and the table continues from it.
func Open(path string, format Format, cols Columns, committed int64) (Table, error) {
	if err := cols.validate(); err != nil {
		return nil, err
	}
	switch format {
	case CSV, JSONLines:
		f, err := openAppend(path, committed)
		if err != nil {
			return nil, err
		}
		t := &textTable{f: f, w: bufio.NewWriterSize(f, 1<<18), n: max(committed, 0), cols: cols, csv: format == CSV}
		if committed < 0 && t.csv {
			t.header()
		}
		return t, nil
	case Parquet:
		return openParquet(path, cols, committed)
	}
	return nil, fmt.Errorf("sink: unknown format %d", format)
}

// openAppend opens path for appending at committed (truncating anything
// after it), or creates it afresh when committed < 0.
func openAppend(path string, committed int64) (*os.File, error) {
	if committed < 0 {
		return os.Create(path)
	}
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if err != nil {
		return nil, fmt.Errorf("%w: %v", ErrResume, err)
	}
	st, err := f.Stat()
	if err == nil && st.Size() < committed {
		err = fmt.Errorf("%w: %s has %d bytes, the last commit covered %d", ErrResume, path, st.Size(), committed)
	}
	if err == nil {
		err = f.Truncate(committed)
	}
	if err == nil {
		_, err = f.Seek(committed, 0)
	}
	if err != nil {
		f.Close()
		return nil, err
	}
	return f, nil
}

// textTable writes CSV or JSON lines.
type textTable struct {
	f    *os.File
	w    *bufio.Writer
	n    int64 // bytes written
	cols Columns
	csv  bool
	buf  []byte
	err  error
}

func (t *textTable) header() {
	b := t.buf[:0]
	names := append(append([]string{t.cols.Time}, fieldNames(t.cols.Fields)...), t.cols.Features...)
	for i, n := range names {
		if i > 0 {
			b = append(b, ',')
		}
		b = appendCSV(b, n)
	}
	b = append(b, '\n')
	t.put(b)
}

func (t *textTable) put(b []byte) {
	t.buf = b
	if t.err != nil {
		return
	}
	n, err := t.w.Write(b)
	t.n += int64(n)
	t.err = err
}

func (t *textTable) Write(r Row) error {
	if t.err != nil {
		return t.err
	}
	b := t.buf[:0]
	if t.csv {
		b = append(b, specfile.FormatTime(r.Time)...)
		for i, f := range t.cols.Fields {
			b = append(b, ',')
			switch f.Type {
			case specfile.String:
				b = appendCSV(b, r.Fields[i].Str)
			case specfile.Number:
				b = strconv.AppendFloat(b, r.Fields[i].Num, 'g', -1, 64)
			case specfile.Bool:
				b = strconv.AppendBool(b, r.Fields[i].Num != 0)
			}
		}
		for _, v := range r.Values {
			b = append(b, ',')
			if !math.IsNaN(v) {
				b = appendNumber(b, v)
			}
		}
	} else {
		b = append(b, '{')
		b = appendJSONString(b, t.cols.Time)
		b = append(b, ':')
		b = appendJSONString(b, specfile.FormatTime(r.Time))
		for i, f := range t.cols.Fields {
			b = append(b, ',')
			b = appendJSONString(b, f.Name)
			b = append(b, ':')
			switch f.Type {
			case specfile.String:
				b = appendJSONString(b, r.Fields[i].Str)
			case specfile.Number:
				b = appendNumber(b, r.Fields[i].Num)
			case specfile.Bool:
				b = strconv.AppendBool(b, r.Fields[i].Num != 0)
			}
		}
		for i, v := range r.Values {
			b = append(b, ',')
			b = appendJSONString(b, t.cols.Features[i])
			b = append(b, ':')
			if math.IsNaN(v) {
				b = append(b, "null"...)
			} else {
				b = appendNumber(b, v)
			}
		}
		b = append(b, '}')
	}
	b = append(b, '\n')
	t.put(b)
	return t.err
}

// appendNumber writes a finite float as JSON and CSV accept it; the
// infinities (a velocity over an empty window cannot produce one, but a
// kind of one's own might) are written as large finite bounds' text.
func appendNumber(b []byte, v float64) []byte {
	switch {
	case math.IsInf(v, 1):
		return append(b, "1e999"...)
	case math.IsInf(v, -1):
		return append(b, "-1e999"...)
	}
	return strconv.AppendFloat(b, v, 'g', -1, 64)
}

func (t *textTable) Commit() (int64, error) {
	if t.err != nil {
		return 0, t.err
	}
	if err := t.w.Flush(); err != nil {
		t.err = err
		return 0, err
	}
	if err := t.f.Sync(); err != nil {
		t.err = err
		return 0, err
	}
	return t.n, nil
}

func (t *textTable) Close() error {
	_, err := t.Commit()
	return errors.Join(err, t.f.Close())
}

func appendCSV(b []byte, s string) []byte {
	if !strings.ContainsAny(s, ",\"\r\n") && (s == "" || s[0] != ' ' && s[0] != '\t') {
		return append(b, s...)
	}
	b = append(b, '"')
	b = append(b, strings.ReplaceAll(s, `"`, `""`)...)
	return append(b, '"')
}

const hexDigits = "0123456789abcdef"

// appendJSONString writes s as a JSON string (invalid UTF-8 becomes
// U+FFFD, as encoding/json does).
func appendJSONString(b []byte, s string) []byte {
	b = append(b, '"')
	for i := 0; i < len(s); {
		c := s[i]
		if c < utf8.RuneSelf {
			switch {
			case c == '"' || c == '\\':
				b = append(b, '\\', c)
			case c == '\n':
				b = append(b, '\\', 'n')
			case c == '\r':
				b = append(b, '\\', 'r')
			case c == '\t':
				b = append(b, '\\', 't')
			case c < 0x20:
				b = append(b, '\\', 'u', '0', '0', hexDigits[c>>4], hexDigits[c&15])
			default:
				b = append(b, c)
			}
			i++
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && size == 1 {
			b = append(b, `\ufffd`...)
		} else {
			b = append(b, s[i:i+size]...)
		}
		i += size
	}
	return append(b, '"')
}
