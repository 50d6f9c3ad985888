package source

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"os"
	"slices"
	"strings"

	"github.com/klauspost/compress/gzip"
	"github.com/klauspost/compress/zstd"
	"github.com/tallyward/tallyward/specfile"
)

// Format is a file format.
type Format uint8

const (
	JSONLines Format = iota
	CSV
	Parquet
)

func (f Format) String() string {
	return [...]string{"jsonl", "csv", "parquet"}[f]
}

// Compression is a whole-file compression.
type Compression uint8

const (
	None Compression = iota
	Gzip
	Zstd
)

// FormatOf tells a file's format and compression from its name:
// .jsonl/.ndjson/.json, .csv, .parquet, each optionally followed by .gz
// or .zst (not for Parquet, which compresses inside).
func FormatOf(path string) (Format, Compression, error) {
	name := strings.ToLower(path)
	comp := None
	if s, ok := strings.CutSuffix(name, ".gz"); ok {
		name, comp = s, Gzip
	} else if s, ok := strings.CutSuffix(name, ".zst"); ok {
		name, comp = s, Zstd
	}
	switch {
	case strings.HasSuffix(name, ".jsonl"), strings.HasSuffix(name, ".ndjson"), strings.HasSuffix(name, ".json"):
		return JSONLines, comp, nil
	case strings.HasSuffix(name, ".csv"):
		return CSV, comp, nil
	case strings.HasSuffix(name, ".parquet"):
		if comp != None {
			return 0, 0, fmt.Errorf("source: %s: Parquet files compress internally; a compressed Parquet file is not supported", path)
		}
		return Parquet, None, nil
	}
	return 0, 0, fmt.Errorf("source: %s: unknown format (want .jsonl, .ndjson, .json, .csv or .parquet, optionally .gz or .zst)", path)
}

// pos is a position in a file: the start of a row.
type pos struct {
	row    int64 // data rows before it (good and bad; header excluded)
	line   int64 // lines before it (0 for Parquet)
	offset int64 // bytes of the (decompressed) file before it
}

// rowReader reads one file's rows.
type rowReader interface {
	// read decodes the row at the current position and moves past it.
	// It returns the row's start position, and io.EOF at the end. A bad
	// row returns a *RowError and is moved past too.
	read() (specfile.Event, pos, error)
	// pos is the start of the next row.
	pos() pos
	close() error
}

// countingFile counts bytes read from the underlying file, for progress.
type countingFile struct {
	*os.File
	n *int64
}

func (c countingFile) Read(p []byte) (int, error) {
	n, err := c.File.Read(p)
	*c.n += int64(n)
	return n, err
}

func (c countingFile) ReadAt(p []byte, off int64) (int, error) {
	n, err := c.File.ReadAt(p, off)
	*c.n += int64(n)
	return n, err
}

// openStream opens path decompressed and positioned at offset: plain
// files by seeking, compressed ones by decompressing up to it.
func openStream(path string, comp Compression, offset int64, counter *int64) (io.Reader, func() error, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, err
	}
	cf := countingFile{f, counter}
	var r io.Reader
	closeFn := f.Close
	switch comp {
	case None:
		if _, err := f.Seek(offset, io.SeekStart); err != nil {
			f.Close()
			return nil, nil, err
		}
		*counter += offset
		return cf, closeFn, nil
	case Gzip:
		zr, err := gzip.NewReader(bufio.NewReaderSize(cf, 1<<16))
		if err != nil {
			f.Close()
			return nil, nil, fmt.Errorf("source: %s: %w", path, err)
		}
		r = zr
	case Zstd:
		zr, err := zstd.NewReader(bufio.NewReaderSize(cf, 1<<16), zstd.WithDecoderConcurrency(1))
		if err != nil {
			f.Close()
			return nil, nil, fmt.Errorf("source: %s: %w", path, err)
		}
		r = zr
		closeFn = func() error { zr.Close(); return f.Close() }
	}
	if offset > 0 {
		if n, err := io.CopyN(io.Discard, r, offset); err != nil {
			closeFn()
			return nil, nil, fmt.Errorf("source: %s: seeking to byte %d of the decompressed file (got %d): %w", path, offset, n, err)
		}
	}
	return r, closeFn, nil
}

// maxLine bounds one JSON line; a longer one is a bad row.
const maxLine = 1 << 20

type jsonlReader struct {
	name   string
	br     *bufio.Reader
	closer func() error
	dec    *specfile.JSONDecoder
	p      pos
	long   []byte
}

func openJSONL(path string, comp Compression, s *specfile.Schema, at pos, counter *int64) (*jsonlReader, error) {
	r, closer, err := openStream(path, comp, at.offset, counter)
	if err != nil {
		return nil, err
	}
	return &jsonlReader{name: path, br: bufio.NewReaderSize(r, 1<<16), closer: closer, dec: s.NewJSONDecoder(), p: at}, nil
}

func (r *jsonlReader) pos() pos     { return r.p }
func (r *jsonlReader) close() error { return r.closer() }

// readLine returns the next line without its newline, the bytes it took,
// and whether it was too long.
func (r *jsonlReader) readLine() ([]byte, int64, bool, error) {
	line, err := r.br.ReadSlice('\n')
	if err == nil || err == io.EOF && len(line) > 0 {
		return bytes.TrimSuffix(line, []byte("\n")), int64(len(line)), false, nil
	}
	if err != bufio.ErrBufferFull {
		return nil, 0, false, err
	}
	r.long = append(r.long[:0], line...)
	n := int64(len(line))
	tooLong := false
	for {
		line, err = r.br.ReadSlice('\n')
		n += int64(len(line))
		if !tooLong {
			r.long = append(r.long, line...)
			if len(r.long) > maxLine {
				tooLong, r.long = true, r.long[:0]
			}
		}
		switch err {
		case bufio.ErrBufferFull:
			continue
		case nil, io.EOF:
			return bytes.TrimSuffix(r.long, []byte("\n")), n, tooLong, nil
		default:
			return nil, 0, false, err
		}
	}
}

func (r *jsonlReader) read() (specfile.Event, pos, error) {
	for {
		at := r.p
		line, n, tooLong, err := r.readLine()
		if err != nil {
			return specfile.Event{}, at, err
		}
		r.p.line++
		r.p.offset += n
		line = bytes.TrimSuffix(line, []byte("\r"))
		if !tooLong && len(bytes.TrimSpace(line)) == 0 {
			continue // blank lines are not rows
		}
		r.p.row++
		if tooLong {
			return specfile.Event{}, at, &RowError{File: r.name, Line: at.line + 1, Row: at.row,
				Err: &specfile.FieldError{Err: fmt.Errorf("%w: line longer than %d bytes", specfile.ErrBadSyntax, maxLine)}}
		}
		ev, err := r.dec.Decode(line)
		if err != nil {
			return specfile.Event{}, at, &RowError{File: r.name, Line: at.line + 1, Row: at.row, Err: err}
		}
		return ev, at, nil
	}
}

type csvReader struct {
	name   string
	s      *specfile.Schema
	cr     *csv.Reader
	closer func() error
	cols   []int // per column: field index, colTime, or colSkip
	base   pos   // where cr started
	p      pos
	seen   []bool
}

const (
	colSkip = -1
	colTime = -2
)

func openCSV(path string, comp Compression, s *specfile.Schema, at pos, counter *int64) (*csvReader, error) {
	// The header is read from the start every time: it maps columns.
	var hdrCount int64
	r, closer, err := openStream(path, comp, 0, &hdrCount)
	if err != nil {
		return nil, err
	}
	hr := csv.NewReader(bufio.NewReaderSize(r, 1<<16))
	hr.FieldsPerRecord = -1
	header, err := hr.Read()
	if err != nil {
		closer()
		if err == io.EOF {
			return nil, fmt.Errorf("source: %s: empty CSV file (a header row is required)", path)
		}
		return nil, fmt.Errorf("source: %s: header: %w", path, err)
	}
	hdrLine, _ := hr.FieldPos(len(header) - 1)
	hdrEnd := pos{line: int64(hdrLine), offset: hr.InputOffset()}
	closer()
	c := &csvReader{name: path, s: s, seen: make([]bool, len(s.Fields))}
	found := make([]bool, len(s.Fields))
	hasTime := false
	for _, h := range header {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		col := colSkip
		if fi, ok := s.Index(h); ok {
			if found[fi] {
				return nil, fmt.Errorf("source: %s: column %q appears twice", path, h)
			}
			col, found[fi] = fi, true
		} else if h == s.TimeField {
			if hasTime {
				return nil, fmt.Errorf("source: %s: column %q appears twice", path, h)
			}
			col, hasTime = colTime, true
		}
		c.cols = append(c.cols, col)
	}
	if !hasTime {
		return nil, fmt.Errorf("source: %s: no %q column (the time field)", path, s.TimeField)
	}
	for fi, ok := range found {
		if !ok && !s.Fields[fi].Optional {
			return nil, fmt.Errorf("source: %s: no %q column (a required field)", path, s.Fields[fi].Name)
		}
	}
	if at.offset < hdrEnd.offset {
		at = hdrEnd
	}
	r, closer, err = openStream(path, comp, at.offset, counter)
	if err != nil {
		return nil, err
	}
	c.cr = csv.NewReader(bufio.NewReaderSize(r, 1<<16))
	c.cr.FieldsPerRecord = -1
	c.cr.ReuseRecord = true
	c.closer = closer
	c.base, c.p = at, at
	return c, nil
}

func (c *csvReader) pos() pos     { return c.p }
func (c *csvReader) close() error { return c.closer() }

func (c *csvReader) read() (specfile.Event, pos, error) {
	at := c.p
	rec, err := c.cr.Read()
	if err == io.EOF {
		return specfile.Event{}, at, io.EOF
	}
	c.p.offset = c.base.offset + c.cr.InputOffset()
	c.p.row++
	startLine := at.line + 1
	if err != nil {
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			startLine = c.base.line + int64(pe.StartLine)
			c.p.line = c.base.line + int64(pe.Line)
			err = pe.Err
		}
		return specfile.Event{}, at, &RowError{File: c.name, Line: startLine, Row: at.row,
			Err: &specfile.FieldError{Err: fmt.Errorf("%w: %v", specfile.ErrBadSyntax, err)}}
	}
	l0, _ := c.cr.FieldPos(0)
	l1, _ := c.cr.FieldPos(len(rec) - 1)
	startLine = c.base.line + int64(l0)
	c.p.line = c.base.line + int64(l1)
	bad := func(err error) (specfile.Event, pos, error) {
		return specfile.Event{}, at, &RowError{File: c.name, Line: startLine, Row: at.row, Err: err}
	}
	if len(rec) != len(c.cols) {
		return bad(&specfile.FieldError{Err: fmt.Errorf("%w: %d columns, the header has %d", specfile.ErrBadSyntax, len(rec), len(c.cols))})
	}
	ev := c.s.NewEvent()
	clear(c.seen)
	haveTime := false
	for i, col := range c.cols {
		cell := rec[i]
		switch {
		case col == colSkip:
		case col == colTime:
			if cell == "" {
				continue
			}
			t, err := c.s.TimeText(cell)
			if err != nil {
				return bad(err)
			}
			ev.Time, haveTime = t, true
		default:
			if cell == "" && c.s.Fields[col].Type != specfile.String {
				continue // an empty number or bool is missing
			}
			if c.s.Fields[col].Type == specfile.String {
				// The cell shares memory with its whole row; a kept key
				// should not hold the row.
				cell = strings.Clone(cell)
			}
			if err := c.s.SetText(&ev, col, cell); err != nil {
				return bad(err)
			}
			c.seen[col] = true
		}
	}
	if !haveTime {
		return bad(&specfile.FieldError{Field: c.s.TimeField, Err: specfile.ErrMissingField})
	}
	if err := finish(c.s, &ev, c.seen); err != nil {
		return bad(err)
	}
	return ev, at, nil
}

// finish checks required fields and fills missing optional bools.
func finish(s *specfile.Schema, ev *specfile.Event, seen []bool) error {
	if err := s.Check(seen); err != nil {
		return err
	}
	for i, ok := range seen {
		if !ok && s.Fields[i].Type == specfile.Bool {
			_ = s.SetBool(ev, i, false)
		}
	}
	return nil
}

// sortedReader reads a whole file at open and serves its rows sorted by
// time (stable: equal times keep file order). Positions are indices into
// the sorted rows, so a resumed reader re-reads and re-sorts the file.
type sortedReader struct {
	rows []sortedRow
	i    int
}

type sortedRow struct {
	ev  specfile.Event
	err error
}

func openSorted(inner rowReader, at pos) (*sortedReader, error) {
	defer inner.close()
	var good, bad []sortedRow
	for {
		ev, _, err := inner.read()
		if err == io.EOF {
			break
		}
		var re *RowError
		if errors.As(err, &re) {
			bad = append(bad, sortedRow{err: err})
			continue
		}
		if err != nil {
			return nil, err
		}
		good = append(good, sortedRow{ev: ev})
	}
	slices.SortStableFunc(good, func(a, b sortedRow) int {
		switch {
		case a.ev.Time < b.ev.Time:
			return -1
		case a.ev.Time > b.ev.Time:
			return 1
		}
		return 0
	})
	// Bad rows come first, so they are counted before any event.
	s := &sortedReader{rows: append(bad, good...), i: int(at.row)}
	if at.row < 0 || at.row > int64(len(s.rows)) {
		return nil, fmt.Errorf("%w: row %d of a file with %d rows", ErrCursor, at.row, len(s.rows))
	}
	return s, nil
}

func (s *sortedReader) pos() pos     { return pos{row: int64(s.i)} }
func (s *sortedReader) close() error { return nil }

func (s *sortedReader) read() (specfile.Event, pos, error) {
	at := s.pos()
	if s.i >= len(s.rows) {
		return specfile.Event{}, at, io.EOF
	}
	r := s.rows[s.i]
	s.rows[s.i] = sortedRow{}
	s.i++
	return r.ev, at, r.err
}
