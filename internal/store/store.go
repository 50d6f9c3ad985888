package store

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"io"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/bloom"
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
	// all caches of the store together. Default: 256 MiB.
	CacheBytes int64

	// BlockCacheBytes is Pebble's block cache size. Default: 32 MiB.
	BlockCacheBytes int64

	// IngestThreshold is the number of staged writes from which Commit
	// writes one sorted table and ingests it instead of applying a batch.
	// A batch goes through Pebble's memtable, one skiplist insert per key;
	// a large commit is several times cheaper written as a table in key
	// order, and the ingest is as atomic and durable as a synced batch
	// (one manifest edit). Small commits keep the batch path so they do
	// not litter level 0 with tiny tables. Negative: never ingest.
	// Default: DefaultIngestThreshold.
	IngestThreshold int

	// Logger receives Pebble's messages (SlogLogger adapts a slog.Logger).
	// Default: a logger that discards them; Pebble's own default would
	// print on every open and exit the process on Fatalf.
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
	if o.FS == nil {
		if o.Dir == "" {
			o.FS = vfs.NewMem()
		} else {
			o.FS = vfs.Default
		}
	}
	if o.Logger == nil {
		o.Logger = quietLogger{}
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
	return errors.Join(errs...)
}

// quietLogger drops Pebble's chatter. Fatalf panics with a fatalError
// instead of exiting the process: Pebble calls it when a write to the log
// fails inside a commit, and the Store recovers that panic on its own
// goroutine and turns it into a sticky ErrFailed. (A Fatalf on one of
// Pebble's background goroutines still ends the process, as Pebble's own
// logger would.)
type quietLogger struct{}

func (quietLogger) Infof(string, ...any)  {}
func (quietLogger) Errorf(string, ...any) {}
func (quietLogger) Fatalf(format string, args ...any) {
	panic(fatalError{fmt.Errorf("pebble: "+format, args...)})
}

type fatalError struct{ err error }

// guard turns a Pebble fatal panic raised on the caller's goroutine into
// the store's sticky error. Use as: defer s.guard(&err).
func (s *Store) guard(err *error) {
	if r := recover(); r != nil {
		f, ok := r.(fatalError)
		if !ok {
			panic(r)
		}
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
	popts   *pebble.Options
	dir     string
	mark    Mark
	budget  *budget
	tables  []flusher
	err     error // sticky: set once a write fails
	closed  bool

	salt       []byte
	tombstones map[[16]byte]struct{}

	commits     uint64
	commitNanos int64 // total time spent in Commit, measured by the caller's clock if any
}

// flusher is a cache that Commit asks to stage its dirty entries.
type flusher interface {
	flushDirty(b writer) error
	dirtyCount() int
}

// Open opens (creating if needed) the store described by opts and reads its
// Mark. Use [Store.Mark] to learn where the source must resume.
func Open(opts Options) (*Store, error) {
	opts.EnsureDefaults()
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	cache := pebble.NewCache(opts.BlockCacheBytes)
	popts := &pebble.Options{
		FS:                 opts.FS,
		Cache:              cache,
		FormatMajorVersion: FormatMajorVersion,
		Logger:             opts.Logger,
		// A commit writes every dirty record in one batch; a memtable
		// that holds several such batches keeps them from being flushed
		// as oversized batches one by one, and the stop threshold leaves
		// room for a flush to finish while the next commit is written.
		MemTableSize:                64 << 20,
		MemTableStopWritesThreshold: 4,
		L0CompactionThreshold:       4,
		L0StopWritesThreshold:       24,
	}
	// A lookup of an entity never seen before is common; bloom filters on
	// every level make it cheap.
	for i := range popts.Levels {
		popts.Levels[i].FilterPolicy = bloom.FilterPolicy(10)
	}
	popts.EnsureDefaults()
	dir := opts.Dir
	if dir == "" {
		dir = "tallyward"
	}
	db, err := pebble.Open(dir, popts)
	cache.Unref()
	if err != nil {
		return nil, fmt.Errorf("state: open %q: %w", dir, err)
	}
	s := &Store{db: db, opts: opts, popts: popts, dir: dir, budget: &budget{limit: opts.CacheBytes}}
	s.pending = db.NewIndexedBatch()
	var m Mark
	found, err := s.getRaw(metaKey(metaMark), func(v []byte) error { return m.UnmarshalBinary(v) })
	if err != nil {
		s.pending.Close()
		db.Close()
		return nil, err
	}
	if found {
		s.mark = m
	}
	if err := s.ensureSalt(); err != nil {
		s.pending.Close()
		db.Close()
		return nil, err
	}
	return s, nil
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
	if s.err != nil {
		return s.err
	}
	return nil
}

func (s *Store) fail(err error) error {
	if s.err == nil {
		s.err = fmt.Errorf("%w: %w", ErrFailed, err)
	}
	return s.err
}

// getRaw looks key up in the pending batch and the database and passes the
// value to fn, which must not retain it.
func (s *Store) getRaw(key []byte, fn func(v []byte) error) (found bool, err error) {
	defer s.guard(&err)
	var v []byte
	var closer io.Closer
	if s.pending.Empty() {
		v, closer, err = s.db.Get(key)
	} else {
		v, closer, err = s.pending.Get(key)
	}
	if errors.Is(err, pebble.ErrNotFound) {
		return false, nil
	}
	if err != nil {
		return false, s.fail(fmt.Errorf("state: get %q: %w", key, err))
	}
	err = fn(v)
	closer.Close()
	if err != nil {
		return true, fmt.Errorf("state: key %q: %w", key, err)
	}
	return true, nil
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
func (s *Store) Definitions() (map[string][]byte, error) {
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
// Options.IngestThreshold); either is atomic. On error the store is failed: nothing of this commit is
// visible after a reopen, and every later call returns the error.
func (s *Store) Commit(m Mark) (err error) {
	defer s.guard(&err)
	if err := s.check(); err != nil {
		return err
	}
	n := int(s.pending.Count())
	for _, t := range s.tables {
		n += t.dirtyCount()
	}
	if s.opts.IngestThreshold > 0 && n >= s.opts.IngestThreshold {
		return s.commitIngest(m)
	}
	// The commit batch is a plain (unindexed) batch: appending to it is
	// far cheaper than inserting into the indexed pending batch, which
	// only exists so that reads see evicted dirty records.
	b := s.db.NewBatch()
	defer b.Close()
	if !s.pending.Empty() {
		if err := b.Apply(s.pending, nil); err != nil {
			return s.fail(err)
		}
	}
	for _, t := range s.tables {
		if err := t.flushDirty(b); err != nil {
			return s.fail(err)
		}
	}
	buf, _ := m.AppendBinary(nil)
	if err := b.Set(metaKey(metaMark), buf, nil); err != nil {
		return s.fail(err)
	}
	if err := b.Commit(pebble.Sync); err != nil {
		return s.fail(fmt.Errorf("state: commit: %w", err))
	}
	return s.committed(m)
}

// committed records a successful commit of m.
func (s *Store) committed(m Mark) error {
	if !s.pending.Empty() {
		s.pending.Close()
		s.pending = s.db.NewIndexedBatch()
	}
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
	if err := s.check(); err != nil {
		return 0, err
	}
	b := s.db.NewBatch()
	defer b.Close()
	n, err := s.sweep(b, w)
	if err == nil && !b.Empty() {
		err = s.pending.Apply(b, nil)
	}
	if err != nil {
		return 0, s.fail(fmt.Errorf("state: expiry sweep: %w", err))
	}
	return n, nil
}

// Close discards anything not committed and closes the database. After a
// failure it still releases what it can and returns the failure.
func (s *Store) Close() (err error) {
	if s.closed {
		return nil
	}
	s.closed = true
	defer s.guard(&err)
	s.pending.Close()
	err = s.db.Close()
	if s.err != nil {
		err = errors.Join(s.err, err)
	}
	return err
}

// DB exposes the underlying database for maintenance (compaction, raw
// scans in tests, checkpoints). Writing to it bypasses the commit protocol.
func (s *Store) DB() *pebble.DB { return s.db }

// Commits returns the number of successful commits since Open.
func (s *Store) Commits() uint64 { return s.commits }

// CachedBytes returns the approximate memory held by all record caches.
func (s *Store) CachedBytes() int64 { return s.budget.used }

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
