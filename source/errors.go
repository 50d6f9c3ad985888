package source

import (
	"errors"
	"fmt"
	"time"

	"github.com/tallyward/tallyward/specfile"
)

var (
	// ErrTooManyBadRows stops a read after more than Options.MaxBadRows
	// rejected rows.
	ErrTooManyBadRows = errors.New("source: too many bad rows")
	// ErrDisorder is matched by every *DisorderError.
	ErrDisorder = errors.New("source: file not in time order")
	// ErrCursor is returned for a cursor that does not match the files.
	ErrCursor = errors.New("source: cursor does not match the input files")
)

// RowError is one rejected row.
type RowError struct {
	File string
	Line int64 // 1-based line of the row's start; 0 for Parquet
	Row  int64 // 0-based data row (header excluded)
	Err  error // a *specfile.FieldError, or a CSV parse error
}

func (e *RowError) Error() string {
	if e.Line > 0 {
		return fmt.Sprintf("%s:%d: %v", e.File, e.Line, e.Err)
	}
	return fmt.Sprintf("%s: row %d: %v", e.File, e.Row, e.Err)
}

func (e *RowError) Unwrap() error { return e.Err }

// DisorderError is a row further out of time order than allowed.
type DisorderError struct {
	File        string
	Line        int64 // 0 for Parquet
	Row         int64
	Time        int64 // the row's time
	Newest      int64 // the newest time before it in the file
	MaxDisorder time.Duration
}

func (e *DisorderError) Error() string {
	where := fmt.Sprintf("%s:%d", e.File, e.Line)
	if e.Line == 0 {
		where = fmt.Sprintf("%s: row %d", e.File, e.Row)
	}
	return fmt.Sprintf("%s: time %s is %v behind the file's newest %s, beyond max_disorder %v (sort the file, or allow sorting it in memory)",
		where, specfile.FormatTime(e.Time), time.Duration(e.Newest-e.Time), specfile.FormatTime(e.Newest), e.MaxDisorder)
}

func (e *DisorderError) Is(target error) bool { return target == ErrDisorder }
