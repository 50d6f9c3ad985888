package source

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/format"
	"github.com/tallyward/tallyward/specfile"
)

// parquetReader reads a Parquet file's rows by column name. Columns must
// be top-level (flat); strings are BYTE_ARRAY, numbers any integer or
// floating type, booleans BOOLEAN; the time column is a TIMESTAMP (read
// by its own unit), or text for the text formats and a number in the
// spec's unit for the unix formats.
type parquetReader struct {
	name string
	s    *specfile.Schema
	f    *os.File
	r    *parquet.Reader
	cols []int // per leaf column: field index, colTime or colSkip
	// timeUnit is the length of one step of a time column annotated as a
	// Parquet TIMESTAMP; such a column is read by its annotation whatever
	// the spec's time format. 0: not annotated.
	timeUnit int64
	buf      []parquet.Row
	n, i     int
	p        pos
	seen     []bool
}

func openParquet(path string, s *specfile.Schema, at pos, counter *int64) (_ *parquetReader, err error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("source: %s: unreadable Parquet file (%v)", path, r)
		}
		if err != nil {
			f.Close()
		}
	}()
	st, err := f.Stat()
	if err != nil {
		return nil, err
	}
	pf, err := parquet.OpenFile(countingFile{f, counter}, st.Size())
	if err != nil {
		return nil, fmt.Errorf("source: %s: %w", path, err)
	}
	pr := &parquetReader{name: path, s: s, f: f, seen: make([]bool, len(s.Fields)), p: at}
	found := make([]bool, len(s.Fields))
	hasTime := false
	for _, leaf := range pf.Schema().Columns() {
		col := colSkip
		if len(leaf) == 1 {
			if fi, ok := s.Index(leaf[0]); ok {
				col, found[fi] = fi, true
			} else if leaf[0] == s.TimeField {
				col, hasTime = colTime, true
			}
		}
		pr.cols = append(pr.cols, col)
	}
	if !hasTime {
		return nil, fmt.Errorf("source: %s: no %q column (the time field)", path, s.TimeField)
	}
	for fi, ok := range found {
		if !ok && !s.Fields[fi].Optional {
			return nil, fmt.Errorf("source: %s: no %q column (a required field)", path, s.Fields[fi].Name)
		}
	}
	if leaf, ok := pf.Schema().Lookup(s.TimeField); ok {
		if lt := leaf.Node.Type().LogicalType(); lt != nil {
			if ts, ok := lt.Value.(*format.TimestampType); ok && ts.Unit.Value != nil {
				pr.timeUnit = int64(ts.Unit.Value.Duration())
			}
		}
	}
	pr.r = parquet.NewReader(pf)
	if at.row > 0 {
		if at.row > pr.r.NumRows() {
			return nil, fmt.Errorf("%w: row %d of %s, which has %d", ErrCursor, at.row, path, pr.r.NumRows())
		}
		if err := pr.r.SeekToRow(at.row); err != nil {
			return nil, fmt.Errorf("source: %s: seeking to row %d: %w", path, at.row, err)
		}
	}
	pr.buf = make([]parquet.Row, 256)
	return pr, nil
}

func (pr *parquetReader) pos() pos { return pr.p }

func (pr *parquetReader) close() error {
	err := pr.r.Close()
	return errors.Join(err, pr.f.Close())
}

func (pr *parquetReader) read() (ev specfile.Event, at pos, err error) {
	at = pr.p
	if pr.i >= pr.n {
		n, err := pr.readRows()
		if n == 0 {
			if err == nil || err == io.EOF {
				return specfile.Event{}, at, io.EOF
			}
			return specfile.Event{}, at, fmt.Errorf("source: %s: row %d: %w", pr.name, at.row, err)
		}
		pr.n, pr.i = n, 0
	}
	row := pr.buf[pr.i]
	pr.i++
	pr.p.row++
	ev, err = pr.decode(row)
	if err != nil {
		return specfile.Event{}, at, &RowError{File: pr.name, Row: at.row, Err: err}
	}
	return ev, at, nil
}

func (pr *parquetReader) readRows() (n int, err error) {
	defer func() {
		if r := recover(); r != nil {
			n, err = 0, fmt.Errorf("unreadable Parquet data (%v)", r)
		}
	}()
	return pr.r.ReadRows(pr.buf)
}

func (pr *parquetReader) decode(row parquet.Row) (specfile.Event, error) {
	s := pr.s
	ev := s.NewEvent()
	clear(pr.seen)
	haveTime := false
	for _, v := range row {
		c := v.Column()
		if c < 0 || c >= len(pr.cols) || v.IsNull() {
			continue
		}
		col := pr.cols[c]
		switch col {
		case colSkip:
			continue
		case colTime:
			var t int64
			var err error
			switch v.Kind() {
			case parquet.ByteArray, parquet.FixedLenByteArray:
				t, err = s.TimeText(string(v.ByteArray()))
			case parquet.Int32, parquet.Int64:
				if pr.timeUnit > 0 {
					t, err = timestamp(intOf(v), pr.timeUnit, s.TimeField)
				} else {
					t, err = s.TimeInt(intOf(v))
				}
			case parquet.Float, parquet.Double:
				t, err = s.TimeNumber(v.Double())
			default:
				err = &specfile.FieldError{Field: s.TimeField, Err: fmt.Errorf("%w: Parquet type %v", specfile.ErrBadTime, v.Kind())}
			}
			if err != nil {
				return specfile.Event{}, err
			}
			ev.Time, haveTime = t, true
			continue
		}
		var err error
		switch v.Kind() {
		case parquet.ByteArray, parquet.FixedLenByteArray:
			err = s.SetText(&ev, col, string(v.ByteArray()))
		case parquet.Int32, parquet.Int64:
			if s.Fields[col].Type == specfile.String {
				ev.Fields[col].Str = strconv.FormatInt(intOf(v), 10)
			} else {
				err = s.SetNumber(&ev, col, float64(intOf(v)))
			}
		case parquet.Float, parquet.Double:
			err = s.SetNumber(&ev, col, v.Double())
		case parquet.Boolean:
			err = s.SetBool(&ev, col, v.Boolean())
		default:
			err = &specfile.FieldError{Field: s.Fields[col].Name, Err: fmt.Errorf("%w: Parquet type %v", specfile.ErrBadField, v.Kind())}
		}
		if err != nil {
			return specfile.Event{}, err
		}
		pr.seen[col] = true
	}
	if !haveTime {
		return specfile.Event{}, &specfile.FieldError{Field: s.TimeField, Err: specfile.ErrMissingField}
	}
	if err := finish(s, &ev, pr.seen); err != nil {
		return specfile.Event{}, err
	}
	return ev, nil
}

func intOf(v parquet.Value) int64 {
	if v.Kind() == parquet.Int32 {
		return int64(v.Int32())
	}
	return v.Int64()
}

// timestamp converts a Parquet TIMESTAMP value of the given unit (ns per
// step) to Unix nanoseconds.
func timestamp(n, unit int64, field string) (int64, error) {
	if n > math.MaxInt64/unit || n < math.MinInt64/unit {
		return 0, &specfile.FieldError{Field: field, Err: fmt.Errorf("%w: %d is out of range", specfile.ErrBadTime, n)}
	}
	return n * unit, nil
}
