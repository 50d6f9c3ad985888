package store

import (
	"bytes"
	"cmp"
	"fmt"
	"math"
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
// Keys and values are copied into one arena; an entry locates them.
type collector struct {
	ents  []entry
	arena []byte
	err   error // sticky: a write too large (the commit fails with it)
}

// entry is one write: its key at off in the arena, its value right after.
// At 16 bytes (slices of the arena were 64), sorting a commit moves a
// quarter of the bytes, and the collector a store keeps for the next
// commit holds less. Entries are appended in write order, so off is also
// the write order, and the last write of a key wins.
type entry struct {
	off  int64
	klen uint32
	vlen uint32 // delLen: a deletion
}

// delLen marks a deletion in entry.vlen.
const delLen = math.MaxUint32

func (e entry) del() bool { return e.vlen == delLen }

// key returns e's key; it is valid until the collector is reset.
func (c *collector) key(e entry) []byte {
	end := e.off + int64(e.klen)
	return c.arena[e.off:end:end]
}

// val returns e's value (nil for a deletion).
func (c *collector) val(e entry) []byte {
	if e.del() {
		return nil
	}
	from := e.off + int64(e.klen)
	end := from + int64(e.vlen)
	return c.arena[from:end:end]
}

// reset empties c for reuse, keeping its room.
func (c *collector) reset() {
	c.ents = c.ents[:0]
	c.arena = c.arena[:0]
	c.err = nil
}

func (c *collector) add(key, value []byte, del bool) error {
	if len(key) >= delLen || len(value) >= delLen {
		if c.err == nil {
			c.err = fmt.Errorf("state: a write of %d+%d bytes is too large for one commit", len(key), len(value))
		}
		return c.err
	}
	e := entry{off: int64(len(c.arena)), klen: uint32(len(key)), vlen: uint32(len(value))}
	if del {
		e.vlen = delLen
	}
	c.arena = append(c.arena, key...)
	c.arena = append(c.arena, value...)
	c.ents = append(c.ents, e)
	return nil
}

func (c *collector) Set(key, value []byte, _ *pebble.WriteOptions) error {
	return c.add(key, value, false)
}

func (c *collector) Delete(key []byte, _ *pebble.WriteOptions) error {
	return c.add(key, nil, true)
}

// sorted returns the writes in key order, the last write of each key only.
func (c *collector) sorted() []entry {
	slices.SortFunc(c.ents, func(a, b entry) int {
		if r := bytes.Compare(c.key(a), c.key(b)); r != 0 {
			return r
		}
		return cmp.Compare(a.off, b.off)
	})
	out := c.ents[:0]
	for i, e := range c.ents {
		if i+1 < len(c.ents) && bytes.Equal(c.key(c.ents[i+1]), c.key(e)) {
			continue // a later write of the same key wins
		}
		out = append(out, e)
	}
	return out
}
