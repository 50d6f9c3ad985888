package store

import (
	"bytes"
	"fmt"
	"math"

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
// Keys and values are copied into two arenas; an entry locates them.
//
// Keys have an arena of their own because sorting reads only keys: next
// to each other a commit's keys take a few megabytes, where keys between
// values (records of hundreds of bytes) put every key on a cache line of
// its own. A comparison sort of 180k writes took 84 ms with keys among
// the values and 60 ms with keys apart (BenchmarkCollectorSorted; the
// radix sort of keysort.go reads each key a few times, not n·log n);
// entries stay 16 bytes (24-byte ones took about 155 ms to sort by
// comparison), so a value's offset counts 8-byte units: values start
// 8-byte aligned.
type collector struct {
	ents []entry
	keys []byte
	vals []byte
	err  error // sticky: a write too large (the commit fails with it)
}

// entry is one write: its key at koff in the key arena, its value at
// 8*voff in the value arena. Entries are appended in write order and
// koff grows with every write (an empty key takes a byte of padding), so
// koff is also the write order, and the last write of a key wins.
type entry struct {
	koff uint32
	klen uint32
	voff uint32
	vlen uint32 // delLen: a deletion
}

const (
	// delLen marks a deletion in entry.vlen.
	delLen = math.MaxUint32
	// maxCommitKeys and maxCommitValues bound one commit's arenas.
	maxCommitKeys   = math.MaxUint32
	maxCommitValues = 8 * math.MaxUint32
)

func (e entry) del() bool { return e.vlen == delLen }

// key returns e's key; it is valid until the collector is reset.
func (c *collector) key(e entry) []byte {
	end := e.koff + e.klen
	return c.keys[e.koff:end:end]
}

// val returns e's value (nil for a deletion).
func (c *collector) val(e entry) []byte {
	if e.del() {
		return nil
	}
	from := 8 * int64(e.voff)
	end := from + int64(e.vlen)
	return c.vals[from:end:end]
}

// reset empties c for reuse, keeping its room.
func (c *collector) reset() {
	c.ents = c.ents[:0]
	c.keys = c.keys[:0]
	c.vals = c.vals[:0]
	c.err = nil
}

func (c *collector) add(key, value []byte, del bool) error {
	var err error
	switch {
	case len(key) >= delLen || len(value) >= delLen:
		err = fmt.Errorf("state: a write of %d+%d bytes is too large for one commit", len(key), len(value))
	case len(c.keys)+len(key)+1 > maxCommitKeys || len(c.vals)+len(value)+8 > maxCommitValues:
		err = fmt.Errorf("state: a commit of more than 4 GiB of keys or 32 GiB of values: commit more often")
	}
	if err != nil {
		if c.err == nil {
			c.err = err
		}
		return c.err
	}
	for len(c.vals)%8 != 0 {
		c.vals = append(c.vals, 0)
	}
	e := entry{koff: uint32(len(c.keys)), klen: uint32(len(key)), voff: uint32(len(c.vals) / 8), vlen: uint32(len(value))}
	if del {
		e.vlen = delLen
	}
	c.keys = append(c.keys, key...)
	if len(key) == 0 {
		c.keys = append(c.keys, 0) // koff must grow
	}
	c.vals = append(c.vals, value...)
	c.ents = append(c.ents, e)
	return nil
}

func (c *collector) Set(key, value []byte, _ *pebble.WriteOptions) error {
	return c.add(key, value, false)
}

func (c *collector) Delete(key []byte, _ *pebble.WriteOptions) error {
	return c.add(key, nil, true)
}

// sorted returns the writes in key order, the last write of each key
// only.
func (c *collector) sorted() []entry {
	c.sortByKey()
	out := c.ents[:0]
	for i, e := range c.ents {
		if i+1 < len(c.ents) && bytes.Equal(c.key(c.ents[i+1]), c.key(e)) {
			continue // a later write of the same key wins
		}
		out = append(out, e)
	}
	return out
}
