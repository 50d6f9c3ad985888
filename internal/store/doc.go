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
// write-back cache (and, for dirty entries evicted to bound memory, in a
// map of staged record writes that later reads see; other staged writes
// wait in an indexed batch). Commit writes every dirty entry, everything
// staged and the caller's [Mark] (source position and watermark), and
// nothing else, in one synced Pebble batch or one ingested table. A crash
// therefore exposes exactly the last commit: never part of one. A caller
// that resumes its source at the stored Mark reproduces its uninterrupted
// run.
//
// [Store.CommitAsync] cuts a commit at once and writes it on a goroutine
// of its own while the caller goes on (see flight.go): dirty records are
// encoded by that goroutine, or by the caller just before it changes one;
// reads see the commit's writes while it is in flight; the next commit,
// Sweep, Snapshot and Close wait for it ([Store.Settle]). The cut touches
// no record: it swaps lists and bumps a generation (handoff.go). Expiry
// is swept by that goroutine too, at the store's sweep watermark, by a
// rule both sides apply to a record's contents, so Get reports a removed
// record absent from the cut on without being told (sweepflight.go). Mark and Commits
// report the last commit that landed. A panic on that goroutine (Pebble
// panics when the database is closed under a running commit, as the crash
// tests do to abandon a store) becomes the store's sticky failure instead
// of ending the process; a programming error there surfaces the same way.
//
// # Damage, full disks and fatal errors
//
// Pebble trusts its files more than a store of personal state can afford
// to: it stops reading a damaged MANIFEST at the damage and deletes the
// tables listed after it as garbage, replays a write-ahead log up to a
// damaged tail without a word, ends the process (through its logger) on
// damage a background job finds, and retries a flush on a full disk
// forever. So Open, before Pebble touches the directory, refuses unrelated
// files (ErrNotStore) and a lock held elsewhere (ErrLocked), reads the
// MANIFEST through (ErrDamaged), checks the OPTIONS file, reads the newest
// log through (damage there is a rollback, reported by Notices and
// RolledBack) and checks free space for the log's replay (ErrNoSpace).
// After a clean Close, which records the sizes of the newest log and the
// MANIFEST, a torn or short tail in either is damage too; after a crash it
// is the write the crash interrupted.
// After Pebble opens, the Mark and the salt, written by the same first
// commit, must agree; callers compare their own counts with CountRecords.
// ReadOnly opens a damaged store for inspection: damage becomes notices.
//
// Table damage found by a read is an error wrapping ErrDamaged that names
// the file; found by a background job, or a full disk met by one, it stops
// the store with that error at its next call. A Pebble fatal error inside
// a call becomes the store's sticky error; the database is then abandoned
// (not closed, which would panic on the references Pebble leaves), its
// files fenced and its lock released, so the same process can reopen it. A
// fatal error on a Pebble goroutine cannot be recovered: the process
// prints it with the store's directory and exits with FatalExitCode.
//
// # Erasure
//
// A deleted record's key leaves the store's files after Compact and Close:
// logs are never reused with old contents in their tails, Close removes
// the logs Pebble keeps for reuse and the previous MANIFEST, and the
// MANIFEST is rewritten as a snapshot soon after the compaction (table
// bounds in older edits are keys). Files are deleted, not overwritten.
//
// # Memory
//
// CacheBytes bounds the decoded records of every Table together with the
// pending batch of records evicted dirty; OverBudget tells the caller to
// commit once the batch holds half of it. Pebble adds its block cache
// (BlockCacheBytes) and up to four memtables (MemTableBytes).
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
// meta name "mark" is encoded as documented on [Mark.AppendBinary]; meta
// "salt" holds the tombstone salt (32 bytes); meta "exact-index" (empty)
// marks a store created by code that keeps each stored record's expiry
// entry in its own bucket, whose sweeps then remove records without
// reading them (an older store's do read).
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
// drives them from one goroutine (or under one lock). The only other
// goroutine is the one writing a commit in flight, which touches the
// database, the collected writes and, through an atomic per-slot state,
// the records it encodes.
package store
