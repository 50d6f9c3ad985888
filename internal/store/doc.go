// Package state keeps keyed byte records in an embedded Pebble database and
// caches their decoded form in memory, so that an event costs a map lookup
// rather than a disk read.
//
// # Contract
//
// The package knows nothing of windows or sketches: it stores opaque values
// under keys built from a table name and an entity key, and asks the cached
// value to encode itself (encoding.BinaryAppender) when it must be written.
//
// Durability is by commit only. Between commits, changes live in the
// write-back cache (and, for dirty entries evicted to bound memory, in an
// unsynced indexed batch that later reads see). Commit writes every dirty
// entry, the caller's [Mark] (source position and watermark) and nothing
// else, in one synced Pebble batch. A crash therefore exposes exactly the
// last commit: never part of one. A caller that resumes its source at the
// stored Mark reproduces its uninterrupted run.
//
// # Key layout
//
// Every key starts with a one-byte tag. Tags are frozen numbers: a retired
// tag is never reused.
//
//	0x01 meta        0x01 | name                        -> versioned meta value
//	0x02 definition  0x02 | name                        -> definition fingerprint (bytes)
//	0x03 record      0x03 | uvarint len(table) | table | entity key -> record bytes
//	0x04 expiry      0x04 | 8-byte big-endian bucket (sign bit flipped) | uvarint len(table) | table | entity key -> empty
//	0x05 tombstone   0x05 | 16-byte salted SHA-256 of (table, entity key) -> empty
//	0x06 part        0x06 | uvarint len(part) | part | part key -> part value (see part.go)
//
// Values under 0x03 are the caller's versioned encodings. The Mark under
// meta name "mark" is encoded as documented on [Mark.AppendBinary].
//
// # Costs
//
// A cache hit is a Go map lookup plus a few pointer moves, with no
// allocation. A miss is a Pebble point lookup (microseconds; bloom filters
// are configured so that the common miss on a new entity is cheap). A commit
// costs one encode and one batch entry per dirty entry plus one fsync.
//
// # Concurrency
//
// A Store and its caches are not safe for concurrent use; the pipeline
// drives them from one goroutine (or under one lock).
package store
