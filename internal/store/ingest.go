package store

import (
	"bytes"
	"slices"

	"github.com/cockroachdb/pebble/v2"
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

// reset empties c for reuse, keeping its room.
func (c *collector) reset() {
	clear(c.ents) // drop references into old arenas
	c.ents = c.ents[:0]
	c.arena = c.arena[:0]
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
