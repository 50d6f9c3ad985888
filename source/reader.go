package source

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"sync"
	"time"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

// Options configures a Reader. The zero value is valid.
type Options struct {
	// MaxDisorder is how far behind the newest earlier row of the same
	// file a row's time may be; the pipeline's Options.MaxDisorder.
	// Default: 0 (each file sorted by time).
	MaxDisorder time.Duration
	// SortFiles reads each file whole and sorts it by time (stably)
	// instead of failing on disorder. Memory grows with the file.
	// Default: false.
	SortFiles bool
	// MaxBadRows is how many rejected rows are tolerated over all files;
	// one more stops the read with ErrTooManyBadRows. Negative: no limit.
	// Default: 0 (the first bad row stops the read).
	MaxBadRows int64
	// OnBadRow is told of each rejected row (to log it, say). A row
	// re-read after a resume is told again. Default: nil.
	OnBadRow func(*RowError)
}

// Validate reports every problem with o.
func (o *Options) Validate() error {
	if o.MaxDisorder < 0 {
		return fmt.Errorf("source: MaxDisorder %v < 0", o.MaxDisorder)
	}
	return nil
}

// fileState is a file's progress as of one of its row starts: what a
// cursor stores and a resumed reader restores.
type fileState struct {
	at     pos
	bad    int64 // rejected rows before at
	hasMax bool
	maxT   int64 // newest time before at
}

type input struct {
	path   string
	size   int64
	format Format
	comp   Compression
	rr     rowReader
	read   int64 // bytes read from the file (progress only)

	// Invariant: when has, head is the decoded row starting at headState.at
	// and cur describes the position after it; otherwise cur is the start
	// of the next row not yet decoded.
	has       bool
	done      bool
	head      specfile.Event
	headState fileState
	cur       fileState
}

// state is the file's cursor state: the start of its next unconsumed row.
func (in *input) state() fileState {
	if in.has {
		return in.headState
	}
	return in.cur
}

type logEntry struct {
	file  int
	state fileState
}

// Reader merges files into one stream ordered by event time.
//
// Events may run on another goroutine than the one calling CursorAt,
// Progress and BadRows (see Ahead): mu guards what they share.
type Reader struct {
	mu    sync.Mutex
	s     *specfile.Schema
	opts  Options
	files []*input
	seq   uint64 // sequence number of the next event Events yields
	// log[i] is the state, before it was yielded, of the file that event
	// logBase+i came from: enough to rebuild any earlier cursor.
	log     []logEntry
	logBase uint64
	err     error
	// badQueue holds rejected rows for Options.OnBadRow, called outside
	// mu so that it may call the Reader.
	badQueue []*RowError
}

// Open opens files (read in the order given; ties in time go to the
// earlier file) for events of schema s. cursor is a cursor from CursorAt
// stored by the last commit, or nil to start at the beginning; seq is the
// sequence number of the first event the reader yields: the pipeline's
// ResumeSeq().
func Open(paths []string, s *specfile.Schema, opts Options, cursor []byte, seq uint64) (*Reader, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	if len(paths) == 0 {
		return nil, errors.New("source: no input files")
	}
	for i, p := range paths {
		if slices.Contains(paths[:i], p) {
			return nil, fmt.Errorf("source: %s is given twice (its events would count twice)", p)
		}
	}
	r := &Reader{s: s, opts: opts, seq: seq, logBase: seq}
	var states []fileState
	if cursor != nil {
		cseq, cpaths, cstates, err := decodeCursor(cursor)
		if err != nil {
			return nil, err
		}
		if cseq != seq {
			return nil, fmt.Errorf("%w: it is at event %d, the pipeline resumes at %d", ErrCursor, cseq, seq)
		}
		if len(cpaths) != len(paths) {
			return nil, fmt.Errorf("%w: it names %d files, %d are given", ErrCursor, len(cpaths), len(paths))
		}
		states = cstates
		for i, p := range paths {
			if cpaths[i].path != p {
				return nil, fmt.Errorf("%w: file %d was %s, now %s", ErrCursor, i+1, cpaths[i].path, p)
			}
		}
		defer func() {
			for i, in := range r.files {
				if in.size != cpaths[i].size {
					r.err = fmt.Errorf("%w: %s changed size since the last run (%d bytes, was %d)", ErrCursor, in.path, in.size, cpaths[i].size)
				}
			}
		}()
	} else if seq != 0 {
		return nil, fmt.Errorf("%w: no cursor, but the pipeline resumes at event %d", ErrCursor, seq)
	}
	for i, p := range paths {
		in := &input{path: p}
		if states != nil {
			in.cur = states[i]
		}
		if err := r.open(in); err != nil {
			r.Close()
			return nil, err
		}
		r.files = append(r.files, in)
	}
	return r, nil
}

func (r *Reader) open(in *input) error {
	st, err := os.Stat(in.path)
	if err != nil {
		return err
	}
	in.size = st.Size()
	if in.format, in.comp, err = FormatOf(in.path); err != nil {
		return err
	}
	at := in.cur.at
	open := func(at pos) (rowReader, error) {
		switch in.format {
		case JSONLines:
			return openJSONL(in.path, in.comp, r.s, at, &in.read)
		case CSV:
			return openCSV(in.path, in.comp, r.s, at, &in.read)
		}
		return openParquet(in.path, r.s, at, &in.read)
	}
	if r.opts.SortFiles {
		inner, err := open(pos{})
		if err != nil {
			return err
		}
		in.rr, err = openSorted(inner, at)
		return err
	}
	in.rr, err = open(at)
	return err
}

// Close closes every file.
func (r *Reader) Close() error {
	var errs []error
	for _, in := range r.files {
		if in.rr != nil {
			errs = append(errs, in.rr.close())
			in.rr = nil
		}
	}
	return errors.Join(errs...)
}

// BadRows is the number of rows rejected so far (as of the next event).
func (r *Reader) BadRows() int64 {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.badRows()
}

func (r *Reader) badRows() int64 {
	var n int64
	for _, in := range r.files {
		n += in.cur.bad
	}
	return n
}

// Progress reports bytes read from the files and their total size.
func (r *Reader) Progress() (read, total int64) {
	r.mu.Lock()
	defer r.mu.Unlock()
	for _, in := range r.files {
		read += in.read
		total += in.size
	}
	return min(read, total), total
}

// fill decodes the next good row of in as its head, skipping bad rows.
func (r *Reader) fill(in *input) error {
	for !in.has && !in.done {
		ev, at, err := in.rr.read()
		if err == io.EOF {
			in.done = true
			in.cur.at = in.rr.pos()
			return nil
		}
		var re *RowError
		if errors.As(err, &re) {
			in.cur.at = in.rr.pos()
			in.cur.bad++
			if r.opts.OnBadRow != nil {
				r.badQueue = append(r.badQueue, re) // told by next, unlocked
			}
			if r.opts.MaxBadRows >= 0 && r.badRows() > r.opts.MaxBadRows {
				return fmt.Errorf("%w (more than %d): last: %w", ErrTooManyBadRows, r.opts.MaxBadRows, re)
			}
			continue
		}
		if err != nil {
			return err
		}
		if in.cur.hasMax && ev.Time < in.cur.maxT-int64(r.opts.MaxDisorder) {
			return &DisorderError{File: in.path, Line: lineOf(in, at), Row: at.row, Time: ev.Time, Newest: in.cur.maxT, MaxDisorder: r.opts.MaxDisorder}
		}
		in.headState = in.cur
		in.headState.at = at
		in.head, in.has = ev, true
		in.cur.at = in.rr.pos()
		if !in.cur.hasMax || ev.Time > in.cur.maxT {
			in.cur.hasMax, in.cur.maxT = true, ev.Time
		}
	}
	return nil
}

func lineOf(in *input, at pos) int64 {
	if in.format == Parquet {
		return 0
	}
	return at.line + 1
}

// Events yields the merged events from the reader's position. A read
// error (too many bad rows, disorder, I/O) is yielded once and ends the
// sequence.
func (r *Reader) Events() tallyward.Source[specfile.Event] {
	return func(yield func(specfile.Event, error) bool) {
		if r.err != nil {
			yield(specfile.Event{}, r.err)
			return
		}
		for {
			ev, ok, err := r.next()
			if err != nil {
				yield(specfile.Event{}, err)
				return
			}
			if !ok || !yield(ev, nil) {
				return
			}
		}
	}
}

// next takes the next event in time order; ok is false at the end.
func (r *Reader) next() (specfile.Event, bool, error) {
	r.mu.Lock()
	ev, ok, err := r.nextLocked()
	bad := r.badQueue
	r.badQueue = nil
	r.mu.Unlock()
	for _, re := range bad {
		r.opts.OnBadRow(re)
	}
	return ev, ok, err
}

func (r *Reader) nextLocked() (ev specfile.Event, ok bool, err error) {
	best := -1
	for i, in := range r.files {
		if err := r.fill(in); err != nil {
			r.err = err
			return ev, false, err
		}
		if in.has && (best < 0 || in.head.Time < r.files[best].head.Time) {
			best = i
		}
	}
	if best < 0 {
		return ev, false, nil
	}
	in := r.files[best]
	r.log = append(r.log, logEntry{file: best, state: in.headState})
	ev = in.head
	in.head, in.has = specfile.Event{}, false
	r.seq++
	return ev, true, nil
}

// CursorAt returns the cursor of the position just before event seq was
// yielded: a Reader opened on it with the same files and that seq yields
// event seq next. seq must lie between the last CursorAt's seq (or the
// first event) and the next event to yield. Positions before seq are
// forgotten, so seq must not decrease from call to call: pass the
// pipeline's CommitPoint.Resume.
func (r *Reader) CursorAt(seq uint64) ([]byte, error) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if seq < r.logBase || seq > r.seq {
		return nil, fmt.Errorf("source: CursorAt(%d) outside the kept range %d..%d", seq, r.logBase, r.seq)
	}
	states := make([]fileState, len(r.files))
	for i, in := range r.files {
		states[i] = in.state()
	}
	for j := len(r.log) - 1; j >= 0 && r.logBase+uint64(j) >= seq; j-- {
		states[r.log[j].file] = r.log[j].state
	}
	drop := int(seq - r.logBase)
	r.log = append(r.log[:0], r.log[drop:]...)
	r.logBase = seq
	return r.encodeCursor(seq, states), nil
}

// Cursor layout (all integers varints unless said):
//
//	byte     version (1)
//	uvarint  seq: the event the cursor stands before
//	uvarint  number of files, then per file:
//	  uvarint+bytes  path as given
//	  uvarint        size in bytes
//	  uvarint        row, line, offset, rejected rows before the row
//	  byte           1 if a newest time follows
//	  varint         newest time before the row (if flagged)
const cursorVersion = 1

func (r *Reader) encodeCursor(seq uint64, states []fileState) []byte {
	b := []byte{cursorVersion}
	b = binary.AppendUvarint(b, seq)
	b = binary.AppendUvarint(b, uint64(len(r.files)))
	for i, in := range r.files {
		st := states[i]
		b = binary.AppendUvarint(b, uint64(len(in.path)))
		b = append(b, in.path...)
		b = binary.AppendUvarint(b, uint64(in.size))
		for _, v := range []int64{st.at.row, st.at.line, st.at.offset, st.bad} {
			b = binary.AppendUvarint(b, uint64(v))
		}
		if st.hasMax {
			b = append(b, 1)
			b = binary.AppendVarint(b, st.maxT)
		} else {
			b = append(b, 0)
		}
	}
	return b
}

type cursorFile struct {
	path string
	size int64
}

func decodeCursor(b []byte) (seq uint64, files []cursorFile, states []fileState, err error) {
	bad := func(what string) error { return fmt.Errorf("%w: damaged cursor (%s)", ErrCursor, what) }
	if len(b) == 0 || b[0] != cursorVersion {
		return 0, nil, nil, bad("unknown version")
	}
	b = b[1:]
	uv := func() (uint64, bool) {
		v, n := binary.Uvarint(b)
		if n <= 0 {
			return 0, false
		}
		b = b[n:]
		return v, true
	}
	var ok bool
	if seq, ok = uv(); !ok {
		return 0, nil, nil, bad("seq")
	}
	n, ok := uv()
	if !ok || n > uint64(len(b)) {
		return 0, nil, nil, bad("file count")
	}
	for range n {
		l, ok := uv()
		if !ok || l > uint64(len(b)) {
			return 0, nil, nil, bad("path")
		}
		cf := cursorFile{path: string(b[:l])}
		b = b[l:]
		var vals [5]uint64
		for i := range vals {
			if vals[i], ok = uv(); !ok || vals[i] > math.MaxInt64 {
				return 0, nil, nil, bad("position")
			}
		}
		cf.size = int64(vals[0])
		st := fileState{at: pos{row: int64(vals[1]), line: int64(vals[2]), offset: int64(vals[3])}, bad: int64(vals[4])}
		if len(b) == 0 {
			return 0, nil, nil, bad("flag")
		}
		flag := b[0]
		b = b[1:]
		switch flag {
		case 0:
		case 1:
			v, m := binary.Varint(b)
			if m <= 0 {
				return 0, nil, nil, bad("newest time")
			}
			b = b[m:]
			st.hasMax, st.maxT = true, v
		default:
			return 0, nil, nil, bad("flag")
		}
		files = append(files, cf)
		states = append(states, st)
	}
	if len(b) != 0 {
		return 0, nil, nil, bad("trailing bytes")
	}
	return seq, files, states, nil
}
