package join

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"os"
	"slices"
	"strconv"
)

// TrainingRow is one row of a training table: an event's features as they
// were at its time and its labels as known when it matured.
type TrainingRow struct {
	// Seq is the row's position in the join's output, from 0. It is part
	// of the committed state: after a crash the rows from the last commit
	// on are written again with the same Seq and the same content, so a
	// sink that keeps the highest Seq it made durable can skip them.
	Seq      uint64
	ID       string    // the event's id
	Time     int64     // the event's time, Unix ns
	Features []float64 // the event's row, in the pipeline's Names order
	Labels   []float64 // one per label kind, in LabelSpec.Labels order
}

// RowSink receives training rows. The CSV and Parquet writers of the file
// package implement it as well.
type RowSink interface {
	// Begin is called once per Open of the pipeline, before any row, with
	// the column names.
	Begin(features, labels []string) error
	// Write receives one row. Its slices are only valid during the call.
	Write(r *TrainingRow) error
	// Flush makes every row written so far durable. It is called before
	// each commit of the pipeline, so a committed row is never lost.
	Flush() error
}

// MemorySink keeps rows in memory, for tests and small tables.
type MemorySink struct {
	Features, Labels []string
	Rows             []TrainingRow
}

// Begin records the column names.
func (m *MemorySink) Begin(features, labels []string) error {
	m.Features, m.Labels = features, labels
	return nil
}

// Write appends a copy of r.
func (m *MemorySink) Write(r *TrainingRow) error {
	c := *r
	c.Features, c.Labels = slices.Clone(r.Features), slices.Clone(r.Labels)
	m.Rows = append(m.Rows, c)
	return nil
}

// Flush does nothing.
func (m *MemorySink) Flush() error { return nil }

// JSONLines writes one JSON object per row:
//
//	{"seq":0,"id":"p-1","time":1700000000000000000,"features":{"account.payments_1h":2},"labels":{"chargeback":1}}
//
// Keys appear in column order; NaN and infinite values are written as
// null (JSON has no such numbers).
type JSONLines struct {
	w                *bufio.Writer
	sync             interface{ Sync() error }
	features, labels []string
	buf              []byte
}

// NewJSONLines writes to w, buffered. If w has a Sync method (an
// *os.File), Flush calls it.
func NewJSONLines(w io.Writer) *JSONLines {
	j := &JSONLines{w: bufio.NewWriterSize(w, 64<<10)}
	j.sync, _ = w.(interface{ Sync() error })
	return j
}

// Begin records the column names.
func (j *JSONLines) Begin(features, labels []string) error {
	j.features, j.labels = slices.Clone(features), slices.Clone(labels)
	return nil
}

// Write appends r's line.
func (j *JSONLines) Write(r *TrainingRow) error {
	b := append(j.buf[:0], `{"seq":`...)
	b = strconv.AppendUint(b, r.Seq, 10)
	b = append(b, `,"id":`...)
	b = strconv.AppendQuote(b, r.ID)
	b = append(b, `,"time":`...)
	b = strconv.AppendInt(b, r.Time, 10)
	b = appendObject(append(b, `,"features":`...), j.features, r.Features)
	b = appendObject(append(b, `,"labels":`...), j.labels, r.Labels)
	b = append(b, "}\n"...)
	j.buf = b
	// Only whole lines reach the file, so a process killed between two
	// flushes never leaves half a line behind.
	if j.w.Available() < len(b) && j.w.Buffered() > 0 {
		if err := j.w.Flush(); err != nil {
			return err
		}
	}
	_, err := j.w.Write(b)
	return err
}

func appendObject(b []byte, names []string, vals []float64) []byte {
	b = append(b, '{')
	for i, v := range vals {
		if i > 0 {
			b = append(b, ',')
		}
		name := strconv.Itoa(i)
		if i < len(names) {
			name = names[i]
		}
		b = strconv.AppendQuote(b, name)
		b = append(b, ':')
		if math.IsNaN(v) || math.IsInf(v, 0) {
			b = append(b, "null"...)
		} else {
			b = strconv.AppendFloat(b, v, 'g', -1, 64)
		}
	}
	return append(b, '}')
}

// Flush writes buffered lines and syncs the file if it can.
func (j *JSONLines) Flush() error {
	if err := j.w.Flush(); err != nil {
		return err
	}
	if j.sync != nil {
		return j.sync.Sync()
	}
	return nil
}

// TrimJSONLines makes a JSON lines file written by JSONLines exactly-once
// across a restart: it cuts the file after the last whole line whose seq
// is below next, dropping rows that the join will write again (and a torn
// last line). Call it after the join is attached, with
// LabelStats.Rows, and before the first event; a missing file is fine.
//
// It relies on the join writing rows in Seq order, which it does.
func TrimJSONLines(path string, next uint64) error {
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return err
	}
	defer f.Close()
	r := bufio.NewReaderSize(f, 64<<10)
	var keep int64
	for {
		line, err := r.ReadBytes('\n')
		if err == io.EOF {
			break // a line without its newline is torn: cut it
		}
		if err != nil {
			return err
		}
		rest, ok := bytes.CutPrefix(line, []byte(`{"seq":`))
		if !ok {
			return fmt.Errorf("join: %s: line at byte %d is not a row", path, keep)
		}
		num, _, _ := bytes.Cut(rest, []byte(","))
		seq, err := strconv.ParseUint(string(num), 10, 64)
		if err != nil {
			return fmt.Errorf("join: %s: line at byte %d: %w", path, keep, err)
		}
		if seq >= next {
			break
		}
		keep += int64(len(line))
	}
	if err := f.Truncate(keep); err != nil {
		return err
	}
	return f.Sync()
}
