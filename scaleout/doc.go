// Package scaleout runs a tallyward pipeline on several machines that share
// a partitioned log over the Kafka protocol (through github.com/twmb/franz-go
// consumer groups). The log's partitioning is the engine: tallyward never
// coordinates instances itself. The root package does not depend on this
// one or on franz-go.
//
// # Partition-owned state
//
// A Member joins a consumer group on a topic keyed by an entity (the
// account, say) and runs one tallyward.Pipeline, with its own Pebble store
// under Config.Dir, per partition it owns. One store per partition, rather
// than key ranges of one shared store, because a partition is the unit that
// moves: handing it over is copying one directory, dropping it is removing
// one, and a lost partition cannot leave half-written records in a store
// the member keeps using. The cost is one Pebble instance (memtables, block
// cache, files) per owned partition, so Options' memory settings apply per
// partition: size them for the partitions an instance may own at once.
//
// The pipeline's source position is the partition's offset: each commit
// stores, as the pipeline's cursor, the offset of the record at its resume
// point and the head (the first offset not consumed). A Settled pipeline's
// held events lie between the two and are read again, without being counted
// twice, by whoever resumes it: the same resume logic as a replay from
// files.
//
// # Commits and hand-over
//
// A member commits after Config.CommitRecords records, when idle, and
// before it lets a pending rebalance proceed (the client blocks rebalances
// while a poll's records are processed). A commit is, in order: for each
// partition changed since the last commit, a snapshot (Pipeline.Snapshot:
// records, cursor, watermark, join state) saved to Snapshots under the
// partition and its head; then the group offsets, equal to those heads.
// With Config.TransactionalID the offsets commit in the same transaction as
// the output records of the rows emitted since the last commit.
//
// A new owner reads the group offset g of each partition it is given and
// loads the snapshot saved at g, then fetches from the snapshot's resume
// offset. A snapshot is confirmed once the group offset names it; older
// ones are pruned then, newer unconfirmed ones (a commit the group refused)
// are never loaded and are replaced by the next save at their head.
//
// Why snapshots rather than a changelog topic of state updates: taking a
// partition over then costs one copy of its store (no replay of anything),
// and the shared storage holds one or two stores per partition, compacted,
// where a changelog holds every update until the log compacts it and a new
// owner reads and applies all of them. The price is that each commit writes
// a full checkpoint of every changed partition (Pebble hard-links its
// tables when the shared directory is on the same filesystem; an object
// store uploads them whole), so commits should be spaced accordingly:
// seconds to minutes of records, not every record. BenchmarkHandover
// measures both sides (see the package README section for figures).
//
// # What happens on failure
//
//   - Revoked cleanly (another member joins, this one leaves, Close):
//     the commit before the rebalance proceeds covers everything consumed;
//     the next owner starts exactly there.
//   - Lost (session timeout) or killed: nothing since the last commit is
//     kept. The next owner loads the last confirmed snapshot and consumes
//     again from its resume offset, so state counts each event once. With a
//     transaction, the rows of the lost work were never visible to
//     read-committed readers and are produced again once; without, they may
//     appear twice (at-least-once), identical.
//   - The group refuses a commit (a rebalance during it, a fenced
//     producer): the transaction aborts and the member rolls every changed
//     partition back to its confirmed snapshot and rewinds the fetch there.
//     The rebalance can restart the fetch at the group offset instead,
//     past a Settled state's resume point: the member drops what comes
//     from there and seeks back (Stats.Rewound), so the held events are
//     read again rather than skipped.
//   - A group offset with no snapshot at it (shared storage lost, or
//     offsets moved by hand): the member stops with ErrNoSnapshot rather
//     than start empty and emit wrong features.
//
// # Several entities per event
//
// A topic can be partitioned by one key only. An event naming an account
// and a device is consumed by the account members on the topic keyed by
// account; Rekey copies it, transactionally, to a topic keyed by device,
// where device members compute the device features. Each stage emits a
// partial row keyed by the event's id; a Meeting puts the parts back
// together. The met row equals one Settled pipeline computing both
// entities (the package's tests check this), provided the device stage's
// MaxDisorder covers how far the re-keying lags across partitions.
//
//	         payments (key: account)
//	          │                │
//	 ┌────────▼───────┐   ┌────▼─────┐
//	 │ account members│   │  Rekey   │  (transactional)
//	 │ one pipeline   │   └────┬─────┘
//	 │ per partition  │        │ payments-by-device (key: device)
//	 └───────┬────────┘   ┌────▼──────────┐
//	         │            │ device members│
//	         │            └────┬──────────┘
//	account rows (id, part 0)  │ device rows (id, part 1)
//	         └──────┐   ┌──────┘
//	              ┌─▼───▼─┐
//	              │Meeting│ → training rows, by event id
//	              └───────┘
//
// # What it is not for
//
// It does not balance load by itself (the group's assignor does), move
// state between machines without shared storage, or make rows delivered to
// Spec.Emit exactly-once: only the transactional output topic is. A
// Meeting keeps its state in memory. A Settled partition releases rows
// only as its own events raise its watermark: a partition that goes quiet
// holds its last rows until its next event (there is no idle advance).
//
// # Concurrency
//
// A Member's Run is called from one goroutine; Close after Run returned.
// Pipelines run on that goroutine and on the client's rebalance callbacks,
// never both at once. Stats and Owned may be called at any time.
package scaleout
