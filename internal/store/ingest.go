package store

import (
	"bytes"
	"context"
	"fmt"
	"slices"

	"github.com/cockroachdb/pebble/v2"
	"github.com/cockroachdb/pebble/v2/objstorage/objstorageprovider"
	"github.com/cockroachdb/pebble/v2/sstable"
	"github.com/cockroachdb/pebble/v2/vfs"
)

// DefaultIngestThreshold is the default of Options.IngestThreshold.
const DefaultIngestThreshold = 16_384

// writer is what staging writes to: a Pebble batch or a collector.
type writer interface {
	Set(key, value []byte, _ *pebble.WriteOptions) error
	Delete(key []byte, _ *pebble.WriteOptions) error
}

// collector gathers staged writes in order, for a commit by ingestion.
type collector struct {
	ents  []entry
	arena []byte
}

type entry struct {
	key, val []byte
	seq      int // write order, so the last write of a key wins
	del      bool
}

func (c *collector) keep(b []byte) []byte {
	c.arena = append(c.arena, b...)
	return c.arena[len(c.arena)-len(b) : len(c.arena) : len(c.arena)]
}

func (c *collector) Set(key, value []byte, _ *pebble.WriteOptions) error {
	c.ents = append(c.ents, entry{key: c.keep(key), val: c.keep(value), seq: len(c.ents)})
	return nil
}

func (c *collector) Delete(key []byte, _ *pebble.WriteOptions) error {
	c.ents = append(c.ents, entry{key: c.keep(key), del: true, seq: len(c.ents)})
	return nil
}

// sorted returns the writes in key order, the last write of each key only.
func (c *collector) sorted() []entry {
	slices.SortFunc(c.ents, func(a, b entry) int {
		if c := bytes.Compare(a.key, b.key); c != 0 {
			return c
		}
		return a.seq - b.seq
	})
	out := c.ents[:0]
	for i, e := range c.ents {
		if i+1 < len(c.ents) && bytes.Equal(c.ents[i+1].key, e.key) {
			continue // a later write of the same key wins
		}
		out = append(out, e)
	}
	return out
}

// commitIngest is Commit for large commits: the pending batch, every dirty
// record and the Mark go into one sorted table that Pebble ingests
// atomically.
func (s *Store) commitIngest(m Mark) error {
	var c collector
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
		if err := t.flushDirty(&c); err != nil {
			return s.fail(err)
		}
	}
	buf, _ := m.AppendBinary(nil)
	c.Set(metaKey(metaMark), buf, nil)

	fs := s.opts.FS
	path := fs.PathJoin(s.dirName(), fmt.Sprintf("commit-%06d.sst", s.commits+1))
	f, err := fs.Create(path, vfs.WriteCategoryUnspecified)
	if err != nil {
		return s.fail(fmt.Errorf("state: commit table: %w", err))
	}
	w := sstable.NewWriter(objstorageprovider.NewFileWritable(f), s.popts.MakeWriterOptions(0, s.db.TableFormat()))
	for _, e := range c.sorted() {
		if e.del {
			err = w.Delete(e.key)
		} else {
			err = w.Set(e.key, e.val)
		}
		if err != nil {
			w.Close()
			return s.fail(fmt.Errorf("state: commit table: %w", err))
		}
	}
	if err := w.Close(); err != nil {
		return s.fail(fmt.Errorf("state: commit table: %w", err))
	}
	if err := s.db.Ingest(context.Background(), []string{path}); err != nil {
		return s.fail(fmt.Errorf("state: commit: ingest: %w", err))
	}
	// Ingest linked or copied the table into the store; the staging file
	// is ours to remove. A leftover one is harmless garbage.
	_ = fs.Remove(path)
	return s.committed(m)
}
