package store

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"os"
	"slices"
	"strconv"
	"strings"
	"syscall"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/record"
	"github.com/cockroachdb/pebble/v2/vfs"
)

// Errors about the store's directory and files, returned by Open (wrapped
// with the file or directory they concern; test with errors.Is).
var (
	// ErrDamaged reports store files whose contents do not match what was
	// committed: a damaged MANIFEST, a table that fails its checksum, or
	// readable state that disagrees with the last commit's progress. Open
	// refuses such a store; Options.ReadOnly opens it for inspection and
	// salvage.
	ErrDamaged = errors.New("state: store files are damaged")
	// ErrLocked reports a store directory that another process (or another
	// open Store in this process) holds.
	ErrLocked = errors.New("state: store is locked")
	// ErrNotStore reports a non-empty directory that holds no store: Open
	// does not create a store among unrelated files.
	ErrNotStore = errors.New("state: directory is not a store")
	// ErrNoSpace reports a disk without room for Open to replay the store's
	// log into tables.
	ErrNoSpace = errors.New("state: not enough free disk space")
	// ErrReadOnly is returned by every write of a store opened with
	// Options.ReadOnly.
	ErrReadOnly = errors.New("state: store is open read-only")
)

// storeFileName reports whether name is a file a store directory may
// hold: Pebble's files and this package's commit staging tables.
func storeFileName(name string) bool {
	switch {
	case name == "LOCK" || name == "CURRENT" || name == closedFile:
		return true
	case strings.HasPrefix(name, "MANIFEST-"), strings.HasPrefix(name, "OPTIONS-"),
		strings.HasPrefix(name, "marker."), strings.HasPrefix(name, "commit-"):
		return true
	}
	base, ext, ok := strings.Cut(name, ".")
	if !ok {
		return false
	}
	if _, err := strconv.ParseUint(base, 10, 64); err != nil {
		return false
	}
	switch ext {
	case "log", "sst", "blob", "dbtmp":
		return true
	}
	return false
}

// inspection is what Open learns about a directory before Pebble opens it.
type inspection struct {
	exists   bool     // a store exists in the directory
	notices  []string // warnings for the caller
	rollback bool     // the newest log ends in damage: earlier commits only
	lock     *pebble.Lock
	options  string // the newest OPTIONS file, if any
}

// inspect checks dir before Pebble opens it, holding the directory lock
// from then on (returned in the inspection; nil for a new directory):
//
//   - a directory with files but no store is refused (ErrNotStore);
//   - a directory locked by another process is refused (ErrLocked);
//   - the MANIFEST, the list of the store's tables, is read through
//     completely: Pebble itself stops silently at the first damaged record
//     and then deletes every table listed after it as garbage, so damage
//     there loses committed state without a word (ErrDamaged);
//   - the newest write-ahead log is read through: if it ends in damage,
//     Pebble replays only the commits before it, which is a rollback to an
//     earlier commit, and the inspection says so in a notice;
//   - when the log must be replayed into tables, enough free space for them
//     (ErrNoSpace), since Pebble retries a flush that finds the disk full
//     forever.
func inspect(fs vfs.FS, dir string, readOnly bool) (in inspection, err error) {
	ls, err := fs.List(dir)
	if err != nil {
		if os.IsNotExist(err) || errors.Is(err, os.ErrNotExist) {
			return in, nil
		}
		return in, fmt.Errorf("state: open %q: %w", dir, err)
	}
	desc, err := pebble.Peek(dir, fs)
	if err != nil {
		return in, fmt.Errorf("%w: %q: %w", ErrDamaged, dir, err)
	}
	if !desc.Exists {
		var foreign []string
		for _, n := range ls {
			if !storeFileName(n) {
				foreign = append(foreign, n)
			}
		}
		if len(foreign) > 0 {
			slices.Sort(foreign)
			if len(foreign) > 3 {
				foreign = append(foreign[:3], "...")
			}
			return in, fmt.Errorf("%w: %q holds other files (%s); use an empty or new directory", ErrNotStore, dir, strings.Join(foreign, ", "))
		}
	}
	if !readOnly {
		in.lock, err = pebble.LockDirectory(dir, fs)
		if err != nil {
			return in, lockError(dir, err)
		}
		defer func() {
			if err != nil {
				in.lock.Close()
				in.lock = nil
			}
		}()
	}
	if !desc.Exists {
		return in, nil
	}
	in.exists = true
	in.options = desc.OptionsFilename
	closed := readClosed(fs, dir)
	if off, size, err := checkRecordFile(fs, desc.ManifestFilename, 0, closed); err != nil {
		msg := fmt.Errorf("%w: %s is unreadable from byte %d of %d (%v): the tables listed after it would be lost; open read-only to inspect or salvage",
			ErrDamaged, desc.ManifestFilename, off, size, err)
		if !readOnly {
			return in, msg
		}
		in.notices = append(in.notices, msg.Error())
	}
	var logs []uint64
	var logBytes int64
	for _, n := range ls {
		num, ok := strings.CutSuffix(n, ".log")
		if !ok {
			continue
		}
		if v, err := strconv.ParseUint(num, 10, 64); err == nil {
			logs = append(logs, v)
			if st, err := fs.Stat(fs.PathJoin(dir, n)); err == nil {
				logBytes += st.Size()
			}
		}
	}
	if len(logs) > 0 {
		newest := slices.Max(logs)
		name := fs.PathJoin(dir, fmt.Sprintf("%06d.log", newest))
		// After a clean Close the log must read to its end exactly; after
		// a crash a torn last record is the commit the crash interrupted.
		if off, size, err := checkRecordFile(fs, name, newest, closed); err != nil {
			in.rollback = true
			in.notices = append(in.notices, fmt.Sprintf(
				"the write-ahead log %s is damaged from byte %d of %d (%v): the store was rolled back to the last commit before the damage; the source resumes from there",
				name, off, size, err))
		}
	}
	if closed != nil && !readOnly {
		// From now on a crash can legitimately tear a file's tail.
		if err := fs.Remove(fs.PathJoin(dir, closedFile)); err != nil {
			return in, fmt.Errorf("state: open %q: %w", dir, err)
		}
	}
	if !readOnly && logBytes > 0 {
		// Replaying the log writes its contents as tables, roughly its own
		// size, plus a new MANIFEST and OPTIONS file.
		need := uint64(logBytes) + 1<<20
		if du, err := fs.GetDiskUsage(dir); err == nil && du.AvailBytes < need {
			return in, fmt.Errorf("%w: %q needs about %d bytes free to open (replaying %d bytes of log), %d are free; free some space and reopen",
				ErrNoSpace, dir, need, logBytes, du.AvailBytes)
		}
	}
	return in, nil
}

func lockError(dir string, err error) error {
	if errors.Is(err, syscall.EAGAIN) || errors.Is(err, syscall.EWOULDBLOCK) || errors.Is(err, syscall.EACCES) {
		return fmt.Errorf("%w by another process: %q (%v)", ErrLocked, dir, err)
	}
	if strings.Contains(err.Error(), "lock") {
		return fmt.Errorf("%w by another Store in this process: %q (%v)", ErrLocked, dir, err)
	}
	return fmt.Errorf("state: lock %q: %w", dir, err)
}

// readLog reads every record of a Pebble record file (a MANIFEST, or the
// write-ahead log numbered logNum) and reports where it stopped if it did
// not end cleanly. Unless strict, a file that ends with a torn last record
// (a crash in the middle of appending it) ends cleanly: that record was
// never acknowledged. Preallocated zeros after the last record always end
// a file cleanly.
func readLog(fs vfs.FS, name string, logNum uint64, strict bool) (off, size int64, err error) {
	f, err := fs.Open(name)
	if err != nil {
		return 0, 0, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return 0, 0, err
	}
	size = st.Size()
	r := newRecordReader(record.NewReader, f, logNum)
	for {
		off = r.Offset()
		rec, err := r.Next()
		if err == nil {
			_, err = io.Copy(io.Discard, rec)
		}
		if err == nil {
			continue
		}
		if err == io.EOF {
			return off, size, nil
		}
		if record.IsInvalidRecord(err) {
			switch tail(f, off, size) {
			case tailZeros:
				return off, size, nil
			case tailTorn:
				if !strict {
					return off, size, nil
				}
				err = fmt.Errorf("the last record runs past the end of the file")
			}
		}
		return off, size, err
	}
}

const (
	tailDamaged = iota // a complete chunk that fails its checksum
	tailTorn           // the first chunk runs past the end of the file
	tailZeros          // only zeros (preallocated space) from here on
)

// tail classifies where a record file stopped being readable. Chunk
// headers: checksum (4), length (2, little-endian), type (1), then a
// 4-byte log number for types 5-8 and 12 bytes more for types 9-12.
func tail(f vfs.File, off, size int64) int {
	var hdr [7]byte
	if off+int64(len(hdr)) > size {
		return tailTorn
	}
	if _, err := f.ReadAt(hdr[:], off); err != nil {
		return tailDamaged
	}
	if allZero(hdr[:]) {
		if zeroFrom(f, off, size) {
			return tailZeros
		}
		return tailDamaged
	}
	var hs int64
	switch t := hdr[6]; {
	case t >= 1 && t <= 4:
		hs = 7
	case t >= 5 && t <= 8:
		hs = 11
	case t >= 9 && t <= 12:
		hs = 19
	default:
		return tailDamaged
	}
	if off+hs+int64(binary.LittleEndian.Uint16(hdr[4:6])) > size {
		return tailTorn
	}
	return tailDamaged
}

// newRecordReader calls record.NewReader with a log number of the
// (internal) type it takes.
func newRecordReader[N ~uint64](mk func(io.Reader, N) *record.Reader, r io.Reader, logNum uint64) *record.Reader {
	return mk(r, N(logNum))
}

// zeroFrom reports whether f holds only zero bytes from off on.
func zeroFrom(f vfs.File, off, size int64) bool {
	buf := make([]byte, 64<<10)
	for pos := off; pos < size; {
		n, err := f.ReadAt(buf, pos)
		if n == 0 && err != nil {
			return err == io.EOF
		}
		if !allZero(buf[:n]) {
			return false
		}
		pos += int64(n)
	}
	return true
}

func allZero(b []byte) bool {
	return len(bytes.TrimLeft(b, "\x00")) == 0
}

// CountRecords counts the committed records of every table: a scan of
// their keys, about a second per ten million records. Callers that keep a
// count of their records in the Mark compare the two on open: a table
// lost to damage shows as fewer records than committed.
func (s *Store) CountRecords() (n int64, err error) {
	defer s.guard(&err)
	if err := s.check(); err != nil {
		return 0, err
	}
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{tagRecord}, UpperBound: []byte{tagRecord + 1}})
	if err != nil {
		return 0, s.fail(err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		n++
	}
	if err := it.Close(); err != nil {
		if pebble.IsCorruptionError(err) {
			err = fmt.Errorf("%w: %w", ErrDamaged, err)
		}
		return n, s.fail(fmt.Errorf("state: count records: %w", err))
	}
	return n, nil
}

// closedFile records, after a clean Close, the name and size of the
// newest write-ahead log and of the MANIFEST, one "<name> <size>" line
// each. Open checks those files against it (a torn or short file then is
// damage, not an interrupted write) and removes it.
const closedFile = "CLOSED-CLEANLY"

// readClosed returns the sizes recorded by the last clean Close, by file
// name (nil if there was none since the last Open).
func readClosed(fs vfs.FS, dir string) map[string]int64 {
	f, err := fs.Open(fs.PathJoin(dir, closedFile))
	if err != nil {
		return nil
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, 4096))
	if err != nil {
		return nil
	}
	out := map[string]int64{}
	for _, l := range strings.Split(strings.TrimSpace(string(b)), "\n") {
		name, size, ok := strings.Cut(l, " ")
		n, err := strconv.ParseInt(size, 10, 64)
		if !ok || err != nil {
			return nil
		}
		out[name] = n
	}
	return out
}

// writeClosed records the newest log and the MANIFEST of a store just
// closed cleanly.
func writeClosed(fs vfs.FS, dir string) error {
	ls, err := fs.List(dir)
	if err != nil {
		return err
	}
	var newest uint64
	found := false
	for _, n := range ls {
		if num, ok := strings.CutSuffix(n, ".log"); ok {
			if v, err := strconv.ParseUint(num, 10, 64); err == nil && (!found || v > newest) {
				newest, found = v, true
			}
		}
	}
	var names []string
	if found {
		names = append(names, fmt.Sprintf("%06d.log", newest))
	}
	if desc, err := pebble.Peek(dir, fs); err == nil && desc.Exists {
		names = append(names, fs.PathBase(desc.ManifestFilename))
	}
	var b strings.Builder
	for _, n := range names {
		st, err := fs.Stat(fs.PathJoin(dir, n))
		if err != nil {
			return err
		}
		fmt.Fprintf(&b, "%s %d\n", n, st.Size())
	}
	f, err := fs.Create(fs.PathJoin(dir, closedFile), vfs.WriteCategoryUnspecified)
	if err != nil {
		return err
	}
	_, err = io.WriteString(f, b.String())
	if err == nil {
		err = f.Sync()
	}
	return errors.Join(err, f.Close())
}

// checkRecordFile reads a MANIFEST or log through (see readLog), strictly
// if a clean Close recorded its size, and checks it is not shorter.
func checkRecordFile(fs vfs.FS, name string, logNum uint64, closed map[string]int64) (off, size int64, err error) {
	want, strict := closed[fs.PathBase(name)]
	off, size, err = readLog(fs, name, logNum, strict)
	if err == nil && strict && size < want {
		off, err = size, fmt.Errorf("the file is %d bytes shorter than when the store was closed", want-size)
	}
	return off, size, err
}

// checkOptions reads the store's OPTIONS file and checks it against the
// options Pebble is about to open with. The store always uses Pebble's
// default comparer and merger, so a mismatch means the file is damaged
// (Pebble's own message would name only the mismatch).
func checkOptions(fs vfs.FS, dir, name string, popts *pebble.Options) error {
	if name == "" {
		return nil
	}
	f, err := fs.Open(name)
	if err != nil {
		return fmt.Errorf("state: open %q: %w", dir, err)
	}
	defer f.Close()
	b, err := io.ReadAll(f)
	if err != nil {
		return fmt.Errorf("state: open %q: %w", dir, err)
	}
	if err := popts.CheckCompatibility(dir, string(b)); err != nil {
		return fmt.Errorf("%w: %s: %v", ErrDamaged, name, err)
	}
	return nil
}
