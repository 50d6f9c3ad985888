package store

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/tallyward/tallyward/internal/wire"
)

// Key tags. Frozen numbers: never reuse a retired value.
const (
	tagMeta       byte = 0x01
	tagDefinition byte = 0x02
	tagRecord     byte = 0x03
)

// FormatMajorVersion is the Pebble format this package writes. It is pinned
// rather than left to Pebble's default so that an upgrade of the Pebble
// module never silently rewrites a store into a format an older binary
// cannot open.
const FormatMajorVersion = pebble.FormatValueSeparation

// Errors returned by this package. They are wrapped with context; test with
// errors.Is.
var (
	// ErrCorrupt reports stored bytes that cannot be decoded. The wrapping
	// error names the key.
	ErrCorrupt = errors.New("state: corrupt stored value")
	// ErrClosed is returned by every method after Close.
	ErrClosed = errors.New("state: store is closed")
	// ErrFailed is returned by every method after a write to the store
	// failed; the store must be closed and reopened, which resumes from the
	// last successful commit.
	ErrFailed = errors.New("state: store failed; reopen to resume from the last commit")
)

// Options configures a Store. The zero value is valid: an in-memory store
// with a 256 MiB record cache.
type Options struct {
	// Dir is the directory of the Pebble database. Empty means an in-memory
	// filesystem that vanishes on Close. Default: "".
	Dir string

	// FS overrides the filesystem, e.g. a crash-simulating or
	// error-injecting one in tests. Default: vfs.Default when Dir is set,
	// else vfs.NewMem().
	FS vfs.FS

	// CacheBytes bounds the approximate memory of decoded records held by
	// all caches of the store together, dirty ones included; records
	// evicted dirty wait for the next commit in a batch whose size
	// OverBudget reports against the same bound. Default: 256 MiB.
	CacheBytes int64

	// BlockCacheBytes is Pebble's block cache size. Default: 32 MiB.
	BlockCacheBytes int64

	// MemTableBytes is the size of one Pebble memtable; Pebble keeps up to
	// four (one being written, three being flushed) before it stalls
	// writes. Default: 64 MiB.
	MemTableBytes int64

	// IngestThreshold is the number of staged writes from which Commit
	// writes one sorted table and ingests it instead of applying a batch.
	// A batch goes through Pebble's memtable, one skiplist insert per key;
	// a large commit is several times cheaper written as a table in key
	// order, and the ingest is as atomic and durable as a synced batch
	// (one manifest edit). Small commits keep the batch path so they do
	// not litter level 0 with tiny tables. Negative: never ingest.
	// Default: DefaultIngestThreshold.
	IngestThreshold int

	// ReadOnly opens an existing store for inspection or salvage: nothing
	// is written (Commit returns ErrReadOnly), and damage that Open would
	// refuse (ErrDamaged) is reported by Notices instead. Default: false.
	ReadOnly bool

	// Logger receives Pebble's informational and error messages
	// (SlogLogger adapts a slog.Logger). Pebble's fatal messages are
	// handled by the store whatever the logger (see Store.Close); the
	// logger sees them as errors. Default: a logger that discards them.
	Logger pebble.Logger
}

// EnsureDefaults fills zero fields with their defaults.
func (o *Options) EnsureDefaults() {
	if o.CacheBytes == 0 {
		o.CacheBytes = 256 << 20
	}
	if o.BlockCacheBytes == 0 {
		o.BlockCacheBytes = 32 << 20
	}
	if o.MemTableBytes == 0 {
		o.MemTableBytes = 64 << 20
	}
	if o.FS == nil {
		if o.Dir == "" {
			o.FS = vfs.NewMem()
		} else {
			o.FS = vfs.Default
		}
	}
	if o.IngestThreshold == 0 {
		o.IngestThreshold = DefaultIngestThreshold
	}
}

// Validate reports every problem with o at once.
func (o *Options) Validate() error {
	var errs []error
	if o.CacheBytes < 0 {
		errs = append(errs, fmt.Errorf("state: CacheBytes %d < 0", o.CacheBytes))
	}
	if o.BlockCacheBytes < 0 {
		errs = append(errs, fmt.Errorf("state: BlockCacheBytes %d < 0", o.BlockCacheBytes))
	}
	if o.MemTableBytes < 0 || o.MemTableBytes >= 4<<30 {
		errs = append(errs, fmt.Errorf("state: MemTableBytes %d outside [0, 4 GiB)", o.MemTableBytes))
	}
	return errors.Join(errs...)
}

// logger is the Pebble logger of one store. Pebble calls Fatalf where it
// cannot continue (a failed write of its MANIFEST, a failed log write
// inside a commit) and expects the process to end there.
//
// On a goroutine inside a call into the Store, Fatalf panics with a
// fatalError that the call's guard recovers into the store's sticky
// error; the store then abandons the database (see Store.Close). On one of
// Pebble's own goroutines nothing can recover the panic, so Fatalf prints
// a readable message naming the store and ends the process with exit code
// FatalExitCode, as Pebble's own logger would but legibly.
//
// Damage Pebble finds in a table is not fatal here: the store's
// DataCorruption handler records it and the read that found it returns an
// error naming the file.
type logger struct {
	dir  string
	user pebble.Logger
	// bg is the first error from Pebble's background work that stops the
	// store (damage, a full disk); the store's next call returns it.
	bg atomic.Pointer[error]
}

// FatalExitCode is the exit code of a process ended by a fatal storage
// error on one of Pebble's background goroutines.
const FatalExitCode = 70

func (l *logger) Infof(format string, args ...any) {
	if l.user != nil {
		l.user.Infof(format, args...)
	}
}

func (l *logger) Errorf(format string, args ...any) {
	if l.user != nil {
		l.user.Errorf(format, args...)
	}
}

func (l *logger) Fatalf(format string, args ...any) {
	err := fmt.Errorf("pebble: "+format, args...)
	if l.user != nil {
		l.user.Errorf("fatal: %v", err)
	}
	if inStoreCall() {
		panic(fatalError{err})
	}
	fmt.Fprintf(os.Stderr, "tallyward: fatal storage error in store %q on a background task the storage engine cannot continue; "+
		"the process stops, and reopening the store resumes from its last commit: %v\n", l.dir, err)
	os.Exit(FatalExitCode)
}

// stop records err as the error that stops the store, if none was.
func (l *logger) stop(err error) { l.bg.CompareAndSwap(nil, &err) }

func (l *logger) background(err error) {
	l.Errorf("background: %v", err)
	if pebble.IsCorruptionError(err) {
		l.stop(fmt.Errorf("%w: %v", ErrDamaged, err))
	} else if errors.Is(err, syscall.ENOSPC) {
		l.stop(fmt.Errorf("%w: %v", ErrNoSpace, err))
	}
}

func (l *logger) corruption(info pebble.DataCorruptionInfo) {
	l.Errorf("%v", info)
	l.stop(fmt.Errorf("%w: %s: %v", ErrDamaged, info.Path, info.Details))
}

// inStoreCall reports whether the current goroutine is inside a method of
// a Store or Table (and so under a guard). Only Fatalf asks, which is
// rare.
func inStoreCall() bool {
	buf := make([]byte, 64<<10)
	buf = buf[:runtime.Stack(buf, false)]
	for line := range bytes.Lines(buf) {
		if bytes.HasPrefix(line, []byte("created by")) {
			continue
		}
		if bytes.Contains(line, []byte("tallyward/internal/store.(*Store).")) || bytes.Contains(line, []byte("tallyward/internal/store.(*Table[")) {
			return true
		}
	}
	return false
}

type fatalError struct{ err error }

// guard turns a Pebble fatal panic raised on the caller's goroutine into
// the store's sticky error and abandons the database. Use as:
// defer s.guard(&err).
func (s *Store) guard(err *error) {
	if r := recover(); r != nil {
		f, ok := r.(fatalError)
		if !ok {
			panic(r)
		}
		s.abandoned = true
		s.fs.fence()
		*err = s.fail(f.err)
	}
}

// Store is one Pebble database holding the records, definitions and
// progress Mark of one pipeline (or one partition of it).
type Store struct {
	db      *pebble.DB
	opts    Options
	cache   *pebble.Cache
	pending *pebble.Batch // indexed; reads see it; written by the next Commit
	spill   *spill        // staged record writes; see spill
	flight  *flight       // the commit being written, if any
	// Buffers of the last landed commit, reused by the next (see freeze).
	spareC     *collector
	spareSw    *collector
	spareDue   *collector
	spareSpill *spill
	// pendingRecords: the pending batch may hold record keys (see spill).
	pendingRecords bool
	// gen is the generation records changed now are dirty in (see
	// Slot.dirtyIn): 1 at Open, raised by every cut. flightGen is the
	// generation the commit in flight took, 0 when none is.
	gen, flightGen uint64
	popts          *pebble.Options
	dir            string
	fs             *storeFS
	lock           *pebble.Lock
	log            *logger
	mark           Mark
	budget         *budget
	tables         []flusher
	err            error // sticky: set once a write fails; under errMu
	errMu          sync.Mutex
	failed         atomic.Bool // err is set
	// stageMu serialises what parts of a table used concurrently share:
	// the spill and the pending batch (see parts.go).
	stageMu sync.Mutex
	// staged caches pendingBytes for the parts' eviction loops.
	staged atomic.Int64
	// sweepW is the sweep watermark (see sweepflight.go); swept counts
	// the records landed commits removed as expired. exactIndex: the
	// store was created by code that keeps every stored record's index
	// entry in its own bucket (meta "exact-index"), so the sweep need not
	// read the records it removes.
	exactIndex bool
	sweepW     int64
	swept      uint64
	// pendingFresh holds the record keys written to the pending batch
	// since the last cut (definition changes): no commit judged them yet.
	pendingFresh map[string]struct{}
	closed       bool
	// abandoned: Pebble failed fatally inside a call; the database is
	// never touched again (Close releases the lock, not the database).
	abandoned bool

	notices  []string
	rollback bool

	salt       []byte
	tombstones map[[16]byte]struct{}

	commits     uint64
	commitNanos int64 // total time spent in Commit, measured by the caller's clock if any
}

// flusher is a cache that Commit asks to stage its dirty entries.
type flusher interface {
	freezeDirty(b writer, w int64) (removed int, err error)
	encodeFrozen(c *collector, gen uint64, w int64, gone *removedKeys) (removed int, err error)
}

// Open opens (creating if needed) the store described by opts and reads its
// Mark. Use [Store.Mark] to learn where the source must resume.
//
// Before Pebble opens the directory, Open refuses a directory of unrelated
// files (ErrNotStore), one locked by another process (ErrLocked), a damaged
// MANIFEST (ErrDamaged) and, when the log must be replayed, a disk without
// room for it (ErrNoSpace); a write-ahead log that ends in damage means the
// store resumes from an earlier commit, which Notices and RolledBack
// report. After it opens, the Mark and the store's salt, written by the
// same first commit, must both be readable or both absent. Callers check
// more (record counts against their progress) with CountRecords.
func Open(opts Options) (_ *Store, err error) {
	opts.EnsureDefaults()
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	dir := opts.Dir
	if dir == "" {
		dir = "tallyward"
	}
	fs := &storeFS{FS: opts.FS}
	if !opts.ReadOnly {
		if err := fs.MkdirAll(dir, 0o755); err != nil {
			return nil, fmt.Errorf("state: open %q: %w", dir, err)
		}
	}
	in, err := inspect(fs, dir, opts.ReadOnly)
	if err != nil {
		return nil, err
	}
	if opts.ReadOnly && !in.exists {
		return nil, fmt.Errorf("state: open %q read-only: %w", dir, errors.New("no store there"))
	}
	log := &logger{dir: dir, user: opts.Logger}
	popts := PebbleOptions(opts)
	cache := popts.Cache
	popts.FS = fs
	popts.Logger = log
	popts.Lock = in.lock
	popts.ReadOnly = opts.ReadOnly
	popts.EventListener = &pebble.EventListener{
		BackgroundError: log.background,
		DataCorruption:  log.corruption,
	}
	if err := checkOptions(fs, dir, in.options, popts); err != nil {
		if in.lock != nil {
			in.lock.Close()
		}
		cache.Unref()
		return nil, err
	}
	s := &Store{opts: opts, popts: popts, dir: dir, fs: fs, lock: in.lock, log: log, budget: &budget{limit: opts.CacheBytes}, gen: 1, sweepW: math.MinInt64, pendingFresh: map[string]struct{}{},
		notices: in.notices, rollback: in.rollback}
	defer func() {
		if err != nil {
			s.release(nil)
		}
	}()
	s.db, err = s.openDB(cache)
	cache.Unref()
	if err != nil {
		return nil, err
	}
	s.pending = s.db.NewIndexedBatch()
	s.spill = newSpill()
	var m Mark
	found, err := s.getRaw(metaKey(metaMark), func(v []byte) error { return m.UnmarshalBinary(v) })
	if err != nil {
		return nil, err
	}
	if found {
		s.mark = m
	}
	salted, err := s.ensureSalt()
	if err != nil {
		return nil, err
	}
	if found != salted {
		what := map[bool]string{true: "the progress mark is readable but the salt is not", false: "the salt is readable but the progress mark is not"}[found]
		if err := s.Damaged(fmt.Sprintf("%s, though the first commit wrote both", what)); err != nil {
			return nil, err
		}
	}
	if s.exactIndex, err = s.getRaw(metaKey(metaExactIndex), func([]byte) error { return nil }); err != nil {
		return nil, err
	}
	if !found && !s.exactIndex && !opts.ReadOnly {
		// A new store: its first commit marks it.
		if err := s.pending.Set(metaKey(metaExactIndex), nil, nil); err != nil {
			return nil, s.fail(err)
		}
		s.exactIndex = true
	}
	return s, nil
}

// openDB opens Pebble, turning a fatal error during the open into an error.
func (s *Store) openDB(cache *pebble.Cache) (db *pebble.DB, err error) {
	defer func() {
		if r := recover(); r != nil {
			f, ok := r.(fatalError)
			if !ok {
				panic(r)
			}
			s.abandoned = true
			s.fs.fence()
			err = fmt.Errorf("state: open %q: %w", s.dir, f.err)
		}
	}()
	db, err = pebble.Open(s.dir, s.popts)
	if err != nil {
		if pebble.IsCorruptionError(err) {
			return nil, fmt.Errorf("%w: open %q: %w", ErrDamaged, s.dir, err)
		}
		if errors.Is(err, syscall.ENOSPC) {
			return nil, fmt.Errorf("%w: open %q: %w", ErrNoSpace, s.dir, err)
		}
		if errors.Is(err, syscall.EAGAIN) {
			return nil, lockError(s.dir, err)
		}
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("%w: open %q: a file the MANIFEST lists is missing: %w", ErrDamaged, s.dir, err)
		}
		return nil, fmt.Errorf("state: open %q: %w", s.dir, err)
	}
	if e := s.log.bg.Load(); e != nil {
		db.Close()
		return nil, *e
	}
	return db, nil
}

// Damaged reports damage found by a check of the readable state: an error
// wrapping ErrDamaged, or, for a store opened read-only, nil and a notice.
func (s *Store) Damaged(what string) error {
	err := fmt.Errorf("%w: %q: %s; open read-only to inspect or salvage", ErrDamaged, s.dir, what)
	if s.opts.ReadOnly {
		s.notices = append(s.notices, err.Error())
		return nil
	}
	return err
}

// Notices returns the warnings Open raised: a rollback to an earlier
// commit, and, for a store opened read-only, the damage it found.
func (s *Store) Notices() []string { return slices.Clone(s.notices) }

// RolledBack reports whether Open found the newest write-ahead log
// damaged, so that the store resumed from a commit before the damage
// rather than from the last one written.
func (s *Store) RolledBack() bool { return s.rollback }

// ReadOnly reports whether the store was opened read-only.
func (s *Store) ReadOnly() bool { return s.opts.ReadOnly }

// release frees what Open or Close holds: the database unless it was
// abandoned, then the directory lock. after, if set, runs between the two
// when the database closed without error.
func (s *Store) release(after func() error) error {
	var err error
	if s.pending != nil {
		s.pending.Close()
		s.pending = nil
	}
	if s.db != nil && !s.abandoned {
		err = s.db.Close()
		if err == nil && after != nil {
			err = after()
		}
	}
	s.db = nil
	if s.lock != nil {
		if s.abandoned {
			// The database holds a reference to the lock that its
			// Close would have dropped; the files are fenced.
			s.lock.Close()
		}
		s.lock.Close()
		s.lock = nil
	}
	return err
}

func (s *Store) dirName() string { return s.dir }

// Mark returns the progress stored by the last Commit (the zero Mark for a
// new store).
func (s *Store) Mark() Mark { return s.mark }

// Err returns the sticky error that stopped the store, if any.
func (s *Store) Err() error { return s.check() }

func (s *Store) check() error {
	if s.closed {
		return ErrClosed
	}
	if s.failed.Load() {
		s.errMu.Lock()
		defer s.errMu.Unlock()
		return s.err
	}
	if e := s.log.bg.Load(); e != nil {
		return s.fail(*e)
	}
	return nil
}

// fail makes err the store's sticky failure (the first one wins). Parts
// of a table may fail concurrently, hence the lock.
func (s *Store) fail(err error) error {
	s.errMu.Lock()
	defer s.errMu.Unlock()
	if s.err == nil {
		s.err = fmt.Errorf("%w: %w", ErrFailed, err)
		s.failed.Store(true)
	}
	return s.err
}

// getRaw looks key up in the pending batch and the database and passes the
// value to fn, which must not retain it.
func (s *Store) getRaw(key []byte, fn func(v []byte) error) (found bool, err error) {
	found, _, err = s.getRecord(key, fn)
	return found, err
}

// getRecord is getRaw that also reports, for a record key, whether the
// value was written since the last cut (the current spill, or a record a
// definition change put in the pending batch): no commit's sweep has
// judged such a record yet (see sweepflight.go).
func (s *Store) getRecord(key []byte, fn func(v []byte) error) (found, fresh bool, err error) {
	defer s.guard(&err)
	var v []byte
	var closer io.Closer
	if key[0] == tagRecord {
		if sv, del, cur, ok := s.lookupStaged(key); ok {
			if del {
				return false, cur, nil
			}
			if err := fn(sv); err != nil {
				return true, cur, fmt.Errorf("state: key %q: %w", key, err)
			}
			return true, cur, nil
		}
	}
	// Parts evicting concurrently write the pending batch (see parts.go):
	// a read through it holds the lock until fn is done with the value.
	// Record keys skip it unless a definition change put records there.
	if key[0] == tagRecord && !s.pendingRecords {
		v, closer, err = s.db.Get(key)
	} else {
		s.stageMu.Lock()
		defer s.stageMu.Unlock()
		if key[0] == tagRecord {
			_, fresh = s.pendingFresh[string(key)]
		}
		if s.pending.Empty() {
			v, closer, err = s.db.Get(key)
		} else {
			v, closer, err = s.pending.Get(key)
		}
	}
	if errors.Is(err, pebble.ErrNotFound) {
		return false, fresh, nil
	}
	if err != nil {
		if pebble.IsCorruptionError(err) {
			err = fmt.Errorf("%w: %w", ErrDamaged, err)
		}
		return false, fresh, s.fail(fmt.Errorf("state: get %q: %w", key, err))
	}
	err = fn(v)
	closer.Close()
	if err != nil {
		return true, fresh, fmt.Errorf("state: key %q: %w", key, err)
	}
	return true, fresh, nil
}

// empty reports whether no key with prefix exists (an error counts as not
// empty: the caller then just takes the slower path).
func (s *Store) empty(prefix []byte) bool {
	it, err := s.pending.NewIter(&pebble.IterOptions{LowerBound: prefix, UpperBound: prefixEnd(prefix)})
	if err != nil {
		return false
	}
	found := it.First()
	return it.Close() == nil && !found
}

// Definitions returns the stored definition fingerprints by name.
func (s *Store) Definitions() (_ map[string][]byte, err error) {
	defer s.guard(&err)
	if err := s.check(); err != nil {
		return nil, err
	}
	out := map[string][]byte{}
	it, err := s.pending.NewIter(&pebble.IterOptions{LowerBound: []byte{tagDefinition}, UpperBound: []byte{tagDefinition + 1}})
	if err != nil {
		return nil, s.fail(err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		out[string(it.Key()[1:])] = bytes.Clone(it.Value())
	}
	if err := it.Close(); err != nil {
		return nil, s.fail(err)
	}
	return out, nil
}

// SetDefinition stages a definition fingerprint; it is written by the next
// Commit.
func (s *Store) SetDefinition(name string, fingerprint []byte) error {
	if err := s.check(); err != nil {
		return err
	}
	key := append([]byte{tagDefinition}, name...)
	if err := s.pending.Set(key, fingerprint, nil); err != nil {
		return s.fail(err)
	}
	return nil
}

// DeleteDefinition stages the removal of a definition fingerprint.
func (s *Store) DeleteDefinition(name string) error {
	if err := s.check(); err != nil {
		return err
	}
	key := append([]byte{tagDefinition}, name...)
	if err := s.pending.Delete(key, nil); err != nil {
		return s.fail(err)
	}
	return nil
}

// Commit writes every dirty cached entry, anything staged, and m in one
// synced batch, or for a large commit one ingested table (see
// Options.IngestThreshold); either is atomic. It returns once the commit
// is durable. On error the store is failed: nothing of this commit is
// visible after a reopen, and every later call returns the error.
func (s *Store) Commit(m Mark) error {
	if err := s.CommitAsync(m); err != nil {
		return err
	}
	if err := s.Settle(); err != nil {
		return err
	}
	s.DropSwept()
	return nil
}

// CommitAsync is Commit that returns once the commit's writes are taken
// (dirty records encoded) and leaves writing them to a goroutine of its
// own; Settle waits for it. The cache and the store stay usable, and reads
// see the commit's writes, while it is in flight. It first waits for the
// previous commit, so at most one is in flight; Mark and Commits report
// the last commit that landed.
func (s *Store) CommitAsync(m Mark) error {
	return s.SweepCommitAsync(math.MinInt64, func(int) Mark { return m })
}

// SweepCommitAsync is CommitAsync that first raises the store's sweep
// watermark to w (w = math.MinInt64 leaves it). Every commit removes, on
// its goroutine, the records expired as of the sweep watermark (see
// sweepflight.go); Get reports them absent from the cut on. mark gets the
// number of records the commit removes and returns the Mark to commit: it
// runs on the commit's goroutine, so it must only read what it captured.
// Swept counts the removals once the commit landed.
func (s *Store) SweepCommitAsync(w int64, mark func(removed int) Mark) (err error) {
	defer s.guard(&err)
	if err := s.Settle(); err != nil {
		return err
	}
	if s.opts.ReadOnly {
		return ErrReadOnly
	}
	return s.freeze(w, mark)
}

// committed records a successful commit of m.
func (s *Store) committed(m Mark) error {
	s.mark = m
	s.mark.Cursor = bytes.Clone(m.Cursor)
	s.mark.Extra = bytes.Clone(m.Extra)
	s.commits++
	return nil
}

// Sweep removes records idle for their table's ttl as of watermark w,
// examining at most SweepLimit expiry index entries; the removals are
// staged for the next Commit (call Sweep just before it, so that a record
// both expired and dirty is dropped rather than written). It returns the
// number of records removed.
//
// Stored records are found through the expiry index, whose entries sit at
// the expiry time rounded up to a multiple of ttl/16: a stored record is
// removed less than ttl/16 after it expires. Dirty cached records are
// removed exactly. Callers that must not see an expired record before the
// sweep (the pipeline does) check LastTime themselves.
func (s *Store) Sweep(w int64) (_ int, err error) {
	defer s.guard(&err)
	if err := s.Settle(); err != nil {
		return 0, err
	}
	b := staging{s}
	n, err := s.sweep(b, w)
	for _, f := range s.tables {
		if err != nil {
			break
		}
		if t, ok := f.(expirer); ok {
			var d int
			d, err = t.expireDirty(b, w)
			n += d
		}
	}
	if err != nil {
		return 0, s.fail(fmt.Errorf("state: expiry sweep: %w", err))
	}
	return n, nil
}

// Close discards anything not committed and closes the database. After a
// failure it still releases what it can and returns the failure.
//
// After a fatal storage error inside a call (see logger), the database is
// abandoned rather than closed: Pebble does not unwind such a failure, and
// closing it would panic on the references it still holds. Its files are
// fenced (nothing it still runs can change them), the directory lock is
// released, and a later Open resumes from the last commit; the abandoned
// database's memory and goroutines stay until the process ends.
//
// A healthy Close also removes the write-ahead logs Pebble keeps for
// reuse: they hold old commits, erased keys included.
func (s *Store) Close() (err error) {
	if s.closed {
		return nil
	}
	defer s.guard(&err)
	settleErr := s.Settle()
	s.closed = true
	var keep int64 = -1
	if !s.abandoned && !s.opts.ReadOnly {
		keep = s.db.Metrics().WAL.Files
	}
	err = s.release(func() error {
		if keep < 0 || s.err != nil {
			return nil
		}
		if err := removeSpareLogs(s.fs, s.dir, int(keep)); err != nil {
			return err
		}
		if err := removeOldManifests(s.fs, s.dir); err != nil {
			return err
		}
		return writeClosed(s.fs, s.dir)
	})
	if s.err != nil {
		err = errors.Join(s.err, err)
	} else if settleErr != nil {
		err = errors.Join(settleErr, err)
	}
	return err
}

// removeOldManifests removes the MANIFEST files of a closed store but
// the current one; Pebble keeps the previous one for debugging, and it
// names keys.
func removeOldManifests(fs vfs.FS, dir string) error {
	desc, err := pebble.Peek(dir, fs)
	if err != nil || !desc.Exists {
		return err
	}
	ls, err := fs.List(dir)
	if err != nil {
		return err
	}
	for _, n := range ls {
		if strings.HasPrefix(n, "MANIFEST-") && fs.PathJoin(dir, n) != desc.ManifestFilename {
			if err := fs.Remove(fs.PathJoin(dir, n)); err != nil {
				return err
			}
		}
	}
	return nil
}

// removeSpareLogs removes every write-ahead log of a closed store but the
// newest keep, which hold its unflushed commits.
func removeSpareLogs(fs vfs.FS, dir string, keep int) error {
	ls, err := fs.List(dir)
	if err != nil {
		return err
	}
	var logs []uint64
	for _, n := range ls {
		if num, ok := strings.CutSuffix(n, ".log"); ok {
			if v, err := strconv.ParseUint(num, 10, 64); err == nil {
				logs = append(logs, v)
			}
		}
	}
	slices.Sort(logs)
	for _, n := range logs[:max(len(logs)-keep, 0)] {
		if err := fs.Remove(fs.PathJoin(dir, fmt.Sprintf("%06d.log", n))); err != nil {
			return err
		}
	}
	return nil
}

// Compact flushes the memtable (starting a new write-ahead log) and
// compacts every table into the last level, so that deleted records and
// their deletion markers leave the store's files: with Close, which
// removes the logs Pebble keeps for reuse, it is what makes a deletion
// leave no trace of the key. It rewrites the whole store.
func (s *Store) Compact() (err error) {
	defer s.guard(&err)
	if err := s.check(); err != nil {
		return err
	}
	if s.opts.ReadOnly {
		return ErrReadOnly
	}
	if err := s.db.Flush(); err != nil {
		return fmt.Errorf("state: compact: %w", err)
	}
	if err := s.db.Compact(context.Background(), []byte{0}, []byte{0xff, 0xff}, true); err != nil {
		return fmt.Errorf("state: compact: %w", err)
	}
	// One more MANIFEST edit after the compaction's: it starts a MANIFEST
	// whose snapshot lists only the compacted tables.
	if err := s.db.Flush(); err != nil {
		return fmt.Errorf("state: compact: %w", err)
	}
	return nil
}

// DB exposes the underlying database for maintenance (compaction, raw
// scans in tests, checkpoints). Writing to it bypasses the commit protocol.
func (s *Store) DB() *pebble.DB { return s.db }

// Swept returns the number of records the commits landed since Open
// removed as expired (each commit's Mark was fixed, by its mark function,
// with its own count).
func (s *Store) Swept() uint64 { return s.swept }

// Commits returns the number of successful commits since Open.
func (s *Store) Commits() uint64 { return s.commits }

// pendingBytes approximates the memory of the pending batch: its
// encoded writes plus the batch index, about a skiplist node per write.
// The figure is cached (noteStaged) so parts evicting concurrently can
// read it without a lock; it is refreshed by every staged write.
func (s *Store) pendingBytes() int64 { return s.staged.Load() }

// noteStaged refreshes the cached pendingBytes. The caller holds stageMu
// or runs while no part is in use.
func (s *Store) noteStaged() {
	if s.pending == nil {
		return
	}
	n := int64(s.pending.Len()) + int64(s.pending.Count())*pendingNodeBytes + s.spill.bytes
	if s.flight != nil {
		n += s.flight.spill.bytes
	}
	s.staged.Store(n)
}

// pendingNodeBytes approximates the index memory per write of an indexed
// batch (a skiplist node with its tower, and arena slack).
const pendingNodeBytes = 64

// OverBudget reports whether the changes waiting for the next commit in
// the pending batch (records evicted dirty, deletions, staged writes) hold
// more than half of Options.CacheBytes. The cache then holds the rest, and
// the caller must commit to keep memory within the budget: eviction can
// only move dirty records into the batch, not out of memory.
func (s *Store) OverBudget() bool {
	return s.pending != nil && 2*s.pendingBytes() > s.budget.limit
}

// CachedBytes returns the approximate memory held by all record caches.
func (s *Store) CachedBytes() int64 { return s.budget.used.Load() }

// DiskBytes returns Pebble's estimate of the on-disk size of the store.
func (s *Store) DiskBytes() uint64 {
	if s.closed {
		return 0
	}
	m := s.db.Metrics()
	return m.DiskSpaceUsage()
}

const metaMark = "mark"

func metaKey(name string) []byte { return append([]byte{tagMeta}, name...) }

// RecordKey appends the store key of (table, entity) to dst.
func RecordKey(dst []byte, table, entity string) []byte {
	dst = append(dst, tagRecord)
	dst = binary.AppendUvarint(dst, uint64(len(table)))
	dst = append(dst, table...)
	return append(dst, entity...)
}

// Mark is a consistent cut of the pipeline's progress, stored in the same
// batch as the state it describes.
type Mark struct {
	// Seen is the number of source events consumed (the next event's
	// sequence number).
	Seen uint64
	// Resume is the sequence number at which the source must restart so
	// that nothing is lost; Resume <= Seen. Events in [Resume, Seen) are
	// re-read and recognised by the caller as already seen.
	Resume uint64
	// Watermark is the pipeline's watermark at the cut.
	Watermark int64
	// Cursor is the caller's own source position (e.g. a log offset).
	Cursor []byte
	// Extra is the pipeline's own progress blob (counters, newest time).
	Extra []byte
}

const markVersion1 = 1

// AppendBinary encodes m:
//
//	byte     version (1)
//	uvarint  Seen
//	uvarint  Resume
//	varint   Watermark
//	uvarint  len(Cursor), Cursor bytes
//	uvarint  len(Extra), Extra bytes
func (m Mark) AppendBinary(dst []byte) ([]byte, error) {
	dst = append(dst, markVersion1)
	dst = binary.AppendUvarint(dst, m.Seen)
	dst = binary.AppendUvarint(dst, m.Resume)
	dst = binary.AppendVarint(dst, m.Watermark)
	dst = binary.AppendUvarint(dst, uint64(len(m.Cursor)))
	dst = append(dst, m.Cursor...)
	dst = binary.AppendUvarint(dst, uint64(len(m.Extra)))
	dst = append(dst, m.Extra...)
	return dst, nil
}

// UnmarshalBinary decodes the format of AppendBinary. m is unchanged on
// error.
func (m *Mark) UnmarshalBinary(b []byte) error {
	d := wire.Decoder{B: b}
	if v := d.Byte(); d.Err == nil && v != markVersion1 {
		return fmt.Errorf("%w: mark version %d", ErrCorrupt, v)
	}
	var out Mark
	out.Seen = d.Uvarint()
	out.Resume = d.Uvarint()
	out.Watermark = d.Varint()
	out.Cursor = bytes.Clone(d.Bytes(d.Len()))
	out.Extra = bytes.Clone(d.Bytes(d.Len()))
	if err := d.Finish(); err != nil {
		return fmt.Errorf("%w: mark: %w", ErrCorrupt, err)
	}
	if out.Resume > out.Seen {
		return fmt.Errorf("%w: mark resume %d > seen %d", ErrCorrupt, out.Resume, out.Seen)
	}
	*m = out
	return nil
}

var _ io.Closer = (*Store)(nil)
