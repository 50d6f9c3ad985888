package store

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"slices"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/objstorage/objstorageprovider"
	"github.com/cockroachdb/pebble/v2/sstable"
	"github.com/cockroachdb/pebble/v2/vfs"
)

// A commit runs in two halves. The freeze, on the caller's goroutine,
// copies everything the commit writes into a collector the caller no
// longer touches: the pending batch's entries and every dirty record,
// encoded. The write (sorting, a table or a batch, the sync or the
// ingest) runs on a goroutine of its own while the caller carries on. At
// most one commit is in flight; the next commit, Sweep, Snapshot and
// Close first wait for it (Settle).
//
// While a commit is in flight, reads must still see what it writes. Its
// pending entries stay in the pending batch (the batch keeps growing, and
// only the entries the commit took are dropped when it lands); the records
// it encoded stay in the cache, and one evicted before the commit lands
// is staged into the pending batch like a dirty one.
//
// Crash consistency is unchanged: the commit is one synced batch or one
// ingested table holding every write and the Mark, so a crash exposes the
// last commit that landed and nothing of one in flight.

// flight is a commit being written.
type flight struct {
	done  chan error
	mark  Mark
	took  uint32 // entries of the pending batch the commit holds
	spill *spill // the spill the commit took; reads see it until it lands
	c     *collector
	ahead aheadTimes // read ahead after the write (readahead.go)
}

// freeze takes the writes of a commit and starts writing them. The store
// must be settled. A w above math.MinInt64 sweeps at w in the same cut
// (see SweepCommitAsync). mark gets the number of records the sweep
// removed and returns the commit's Mark.
func (s *Store) freeze(w int64, mark func(removed int) Mark) error {
	// The collector and spill of the last landed commit are reused: a
	// commit's buffers run to megabytes, and allocating them anew while
	// the GC marks makes the caller pay for marking in proportion.
	c := s.spareC
	s.spareC = nil
	if c == nil {
		c = &collector{}
	}
	took := s.pending.Count()
	r := s.pending.Reader()
	for {
		kind, k, v, ok, err := r.Next()
		if err != nil {
			return s.fail(fmt.Errorf("state: read pending batch: %w", err))
		}
		if !ok {
			break
		}
		switch kind {
		case pebble.InternalKeyKindSet:
			c.Set(k, v, nil)
		case pebble.InternalKeyKindDelete:
			c.Delete(k, nil)
		default:
			return s.fail(fmt.Errorf("state: unexpected %v in pending batch", kind))
		}
	}
	cw := cutWriter{s, c}
	removed, err := s.sweep(cw, w)
	if err != nil {
		return s.fail(fmt.Errorf("state: expiry sweep: %w", err))
	}
	for _, t := range s.tables {
		n, err := t.freezeDirty(cw, w)
		removed += n
		if err != nil {
			return s.fail(err)
		}
	}
	gen := s.gen
	s.gen++
	// The spill last: the walks above staged their record deletions in it.
	for k, e := range s.spill.m {
		if e.del {
			c.Delete([]byte(k), nil)
		} else {
			c.Set([]byte(k), e.val, nil)
		}
	}
	m := mark(removed)
	m.Cursor, m.Extra = bytes.Clone(m.Cursor), bytes.Clone(m.Extra)
	f := &flight{done: make(chan error, 1), mark: m, took: took, spill: s.spill, c: c}
	if sp := s.spareSpill; sp != nil {
		s.spill, s.spareSpill = sp, nil
	} else {
		s.spill = newSpill()
	}
	s.flight, s.flightGen = f, gen
	s.noteStaged()
	n := len(c.ents)
	for _, t := range s.tables {
		n += t.frozenCount()
	}
	ingest := s.opts.IngestThreshold > 0 && n >= s.opts.IngestThreshold
	seq := s.commits + 1
	tables := slices.Clone(s.tables)
	aheadW, peek := s.aheadW, s.peekFuncs()
	s.aheadW = math.MinInt64
	go func() {
		err := encodeAll(tables, c, gen)
		if err == nil {
			buf, _ := m.AppendBinary(nil)
			c.Set(metaKey(metaMark), buf, nil)
			err = s.write(c, ingest, seq)
		}
		if err == nil {
			f.ahead = s.readAhead(aheadW, peek)
		}
		f.done <- err
	}()
	return nil
}

// cutWriter is where a commit's cut writes. Record writes are staged in
// the spill, so that reads see them while the commit is in flight (the
// spill then goes to the commit whole). Expiry index writes go straight
// into the commit: only a sweep reads the index, and the next one runs
// after this commit landed. Staging them in the pending batch instead
// inserted each into its skiplist on the caller's path.
type cutWriter struct {
	s *Store
	c *collector
}

func (w cutWriter) Set(key, value []byte, _ *pebble.WriteOptions) error {
	if len(key) > 0 && key[0] == tagRecord {
		return staging{w.s}.Set(key, value, nil)
	}
	return w.c.Set(key, value, nil)
}

func (w cutWriter) Delete(key []byte, _ *pebble.WriteOptions) error {
	if len(key) > 0 && key[0] == tagRecord {
		return staging{w.s}.Delete(key, nil)
	}
	return w.c.Delete(key, nil)
}

// Settle waits for the commit in flight, if any, and reports its failure
// (which also fails the store).
func (s *Store) Settle() error {
	f := s.flight
	if f == nil {
		return s.check()
	}
	err := <-f.done
	s.flight, s.flightGen = nil, 0
	var fw fatalWrite
	if errors.As(err, &fw) {
		// As guard does for a fatal error on the caller's goroutine.
		s.abandoned = true
		s.fs.fence()
		return s.fail(fw.err)
	}
	if err != nil {
		return s.fail(err)
	}
	if err := s.dropTaken(f.took); err != nil {
		return s.fail(err)
	}
	f.c.reset()
	s.spareC = f.c
	f.spill.reset()
	s.spareSpill = f.spill
	s.ahead = f.ahead
	s.noteStaged()
	return s.committed(f.mark)
}

// (The spill's keys are converted once more above: c.keep copies them.)

// dropTaken removes the first n entries, now durable, from the pending
// batch, keeping the ones written while the commit was in flight.
func (s *Store) dropTaken(n uint32) error {
	old := s.pending
	if old.Count() == n {
		if n > 0 {
			old.Close()
			s.pending = s.db.NewIndexedBatch()
			s.pendingRecords = false
		}
		return nil
	}
	nb := s.db.NewIndexedBatch()
	r := old.Reader()
	for i := uint32(0); ; i++ {
		kind, k, v, ok, err := r.Next()
		if err != nil {
			nb.Close()
			return fmt.Errorf("state: read pending batch: %w", err)
		}
		if !ok {
			break
		}
		if i < n {
			continue
		}
		switch kind {
		case pebble.InternalKeyKindSet:
			err = nb.Set(k, v, nil)
		case pebble.InternalKeyKindDelete:
			err = nb.Delete(k, nil)
		default:
			err = fmt.Errorf("state: unexpected %v in pending batch", kind)
		}
		if err != nil {
			nb.Close()
			return err
		}
	}
	old.Close()
	s.pending = nb
	return nil
}

// fatalWrite is a Pebble fatal error raised while a commit was written;
// Settle handles it as guard does on the caller's goroutine.
type fatalWrite struct{ err error }

func (f fatalWrite) Error() string { return f.err.Error() }

// write is the background half of a commit: it owns c and touches nothing
// else of s but the database, the filesystem and the fixed options.
func (s *Store) write(c *collector, ingest bool, seq uint64) (err error) {
	defer func() {
		if r := recover(); r != nil {
			// No panic may escape this goroutine: it would end the
			// process. Pebble panics when the database is closed under
			// a running commit (as a crash test does to abandon a store).
			if f, ok := r.(fatalError); ok {
				err = fatalWrite{f.err}
			} else {
				err = fmt.Errorf("state: commit: %v", r)
			}
		}
	}()
	if c.err != nil {
		return c.err
	}
	if ingest {
		return s.writeTable(c, seq)
	}
	// A plain (unindexed) batch, in write order: the last write of a key
	// wins as it did in the pending batch.
	b := s.db.NewBatch()
	defer b.Close()
	for _, e := range c.ents {
		if e.del() {
			err = b.Delete(c.key(e), nil)
		} else {
			err = b.Set(c.key(e), c.val(e), nil)
		}
		if err != nil {
			return err
		}
	}
	if err := b.Commit(pebble.Sync); err != nil {
		return fmt.Errorf("state: commit: %w", err)
	}
	return nil
}

// writeTable writes c as one sorted table and ingests it: for large
// commits, several times cheaper than a batch through the memtable, and
// as atomic and durable (one manifest edit).
func (s *Store) writeTable(c *collector, seq uint64) error {
	fs := s.opts.FS
	path := fs.PathJoin(s.dirName(), fmt.Sprintf("commit-%06d.sst", seq))
	f, err := fs.Create(path, vfs.WriteCategoryUnspecified)
	if err != nil {
		return fmt.Errorf("state: commit table: %w", err)
	}
	w := sstable.NewWriter(objstorageprovider.NewFileWritable(f), s.popts.MakeWriterOptions(0, s.db.TableFormat()))
	for _, e := range c.sorted() {
		if e.del() {
			err = w.Delete(c.key(e))
		} else {
			err = w.Set(c.key(e), c.val(e))
		}
		if err != nil {
			w.Close()
			return fmt.Errorf("state: commit table: %w", err)
		}
	}
	if err := w.Close(); err != nil {
		return fmt.Errorf("state: commit table: %w", err)
	}
	if err := s.db.Ingest(context.Background(), []string{path}); err != nil {
		return fmt.Errorf("state: commit: ingest: %w", err)
	}
	// Ingest linked or copied the table into the store; the staging file
	// is ours to remove. A leftover one is harmless garbage.
	_ = fs.Remove(path)
	return nil
}
