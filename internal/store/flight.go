package store

import (
	"bytes"
	"context"
	"errors"
	"fmt"
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
	done    chan error
	mark    Mark
	took    uint32 // entries of the pending batch the commit holds
	spill   *spill // the spill the commit took; reads see it until it lands
	c, sw   *collector
	due     *collector // the sweep's scratch
	removed int        // records the commit removed as expired (set before done)
	// gone lists the removed records' entities, for the caches to drop
	// (see Table.queueSwept); set before done.
	gone *removedKeys
}

// freeze takes the writes of a commit and starts writing them. The store
// must be settled. A w above the sweep watermark raises it (see
// sweepflight.go); every commit sweeps at the watermark. mark gets the
// number of records the commit removed and returns its Mark; it runs on
// the commit's goroutine.
func (s *Store) freeze(w int64, mark func(removed int) Mark) error {
	// The collectors and spill of the last landed commit are reused: a
	// commit's buffers run to megabytes, and allocating them anew while
	// the GC marks makes the caller pay for marking in proportion.
	c, sw, due := s.spareC, s.spareSw, s.spareDue
	s.spareC, s.spareSw, s.spareDue = nil, nil, nil
	if c == nil {
		c, sw, due = &collector{}, &collector{}, &collector{}
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
	for _, t := range s.tables {
		if _, err := t.freezeDirty(c, w); err != nil {
			return s.fail(err)
		}
	}
	if w > s.sweepW {
		s.sweepW = w
	}
	gen, sweepW := s.gen, s.sweepW
	s.gen++
	clear(s.pendingFresh)
	f := &flight{done: make(chan error, 1), took: took, spill: s.spill, c: c, sw: sw, due: due}
	if sp := s.spareSpill; sp != nil {
		s.spill, s.spareSpill = sp, nil
	} else {
		s.spill = newSpill()
	}
	s.flight, s.flightGen = f, gen
	s.noteStaged()
	seq := s.commits + 1
	tables := slices.Clone(s.tables)
	sweepers, parts := s.sweepTables()
	go func() {
		f.done <- s.land(f, tables, gen, sweepW, sweepers, parts, mark, seq)
	}()
	return nil
}

// land is the commit's goroutine: it completes the commit's writes
// (the spill, the frozen records, the sweep, the Mark) and writes them.
func (s *Store) land(f *flight, tables []flusher, gen uint64, w int64, sweepers map[string]sweepTable, parts map[string]int, mark func(int) Mark, seq uint64) (err error) {
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
	c, sw := f.c, f.sw
	// The spill before the frozen records, which are newer.
	for k, e := range f.spill.m {
		if e.del {
			c.Delete([]byte(k), nil)
		} else {
			c.Set([]byte(k), e.val, nil)
		}
	}
	gone := &removedKeys{parts: parts, m: map[string][][]string{}}
	removed, err := encodeAll(tables, c, gen, w, gone)
	if err != nil {
		return err
	}
	if c.err != nil {
		return c.err
	}
	cs := c.sorted()
	n, err := s.sweepFlight(c, cs, sw, f.due, w, sweepers, gone)
	if err != nil {
		return fmt.Errorf("state: expiry sweep: %w", err)
	}
	removed += n
	m := mark(removed)
	m.Cursor, m.Extra = bytes.Clone(m.Cursor), bytes.Clone(m.Extra)
	buf, _ := m.AppendBinary(nil)
	sw.Set(metaKey(metaMark), buf, nil)
	if sw.err != nil {
		return sw.err
	}
	f.mark, f.removed, f.gone = m, removed, gone
	ingest := s.opts.IngestThreshold > 0 && len(cs)+len(sw.ents) >= s.opts.IngestThreshold
	return s.write(c, cs, sw, ingest, seq)
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
	f.sw.reset()
	f.due.reset()
	s.spareC, s.spareSw, s.spareDue = f.c, f.sw, f.due
	f.spill.reset()
	s.spareSpill = f.spill
	s.swept += uint64(f.removed)
	for _, t := range s.tables {
		if q, ok := t.(sweptQueue); ok {
			q.queueSwept(f.gone)
		}
	}
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

// write is the background half of a commit: it owns c and sw and touches
// nothing else of s but the database, the filesystem and the fixed
// options. cs are c's writes sorted, one per key; sw's are newer.
func (s *Store) write(c *collector, cs []entry, sw *collector, ingest bool, seq uint64) error {
	if ingest {
		return s.writeTable(c, cs, sw, seq)
	}
	// A plain (unindexed) batch: c's writes, then sw's in write order, so
	// the last write of a key wins.
	b := s.db.NewBatch()
	defer b.Close()
	put := func(c *collector, e entry) error {
		if e.del() {
			return b.Delete(c.key(e), nil)
		}
		return b.Set(c.key(e), c.val(e), nil)
	}
	for _, e := range cs {
		if err := put(c, e); err != nil {
			return err
		}
	}
	for _, e := range sw.ents {
		if err := put(sw, e); err != nil {
			return err
		}
	}
	if err := b.Commit(pebble.Sync); err != nil {
		return fmt.Errorf("state: commit: %w", err)
	}
	return nil
}

// writeTable writes cs and sw's writes as one sorted table (sw's winning
// a key both hold) and ingests it: for large commits, several times
// cheaper than a batch through the memtable, and as atomic and durable
// (one manifest edit).
func (s *Store) writeTable(c *collector, cs []entry, sw *collector, seq uint64) error {
	fs := s.opts.FS
	path := fs.PathJoin(s.dirName(), fmt.Sprintf("commit-%06d.sst", seq))
	f, err := fs.Create(path, vfs.WriteCategoryUnspecified)
	if err != nil {
		return fmt.Errorf("state: commit table: %w", err)
	}
	w := sstable.NewWriter(objstorageprovider.NewFileWritable(f), s.popts.MakeWriterOptions(0, s.db.TableFormat()))
	ss := sw.sorted()
	i, j := 0, 0
	for i < len(cs) || j < len(ss) {
		from, e := c, entry{}
		switch {
		case j == len(ss):
			e = cs[i]
			i++
		case i == len(cs):
			from, e = sw, ss[j]
			j++
		default:
			switch r := bytes.Compare(c.key(cs[i]), sw.key(ss[j])); {
			case r < 0:
				e = cs[i]
				i++
			case r == 0:
				i++
				fallthrough
			default:
				from, e = sw, ss[j]
				j++
			}
		}
		if e.del() {
			err = w.Delete(from.key(e))
		} else {
			err = w.Set(from.key(e), from.val(e))
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
