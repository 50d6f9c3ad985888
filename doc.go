// Package tallyward computes per-entity behavioural features for fraud and
// abuse detection (how many failed sign-ins from this address in the last
// ten minutes, how many distinct accounts on this device today) inline in a
// Go service, and recomputes them identically over replayed history.
//
// # Model
//
// A [Spec] names entities (account, card, device, address...) and, per
// entity, features: an aggregate [Kind] with an optional filter, value and
// item. [Open] builds a [Pipeline] over a Pebble store (in memory when
// Options.Dir is empty). Events carry an event time in Unix nanoseconds;
// window panes are aligned to the Unix epoch, so every instance and every
// restart cuts identical panes.
//
// The watermark is the newest event time minus Options.MaxDisorder and
// never decreases. An event below it on arrival is late: it is counted and
// then dropped, applied or diverted according to Options.Lateness. Events
// with a zero time, a time outside [Options.EarliestTime,
// Options.LatestTime], a value that is NaN, infinite or beyond ±MaxValue,
// or a time beyond Options.FutureSkew of the newest time (in live mode
// also beyond FutureSkew ahead of, or PastSkew behind, the clock) are
// rejected with a *RejectError and counted; they never reach state. A
// stray event within the range can still set a wrong newest time, and
// that is durable: [Pipeline.ResetNewest] is the way out.
//
// # Emission
//
// In Eager mode [Pipeline.Score] returns an event's features at once, as of
// its time, over every event applied so far: for inline scoring. In Settled
// mode an event's row goes to Spec.Emit once the watermark passes its time;
// held events are applied in canonical (time, tie-break) order, so the rows
// depend only on the multiset of events, not on their arrival order within
// MaxDisorder. Either way, as-of answers never count an event newer than
// the asked time.
//
// # Replay and live
//
// [Pipeline.Replay] (a finite [Source]) and [Live] (goroutines, a channel,
// an injected [Clock]) drive the same synchronous core: a live run and a
// replay of the same sequence give bit-identical rows.
//
// # Durability
//
// [Pipeline.Commit] writes changed state, the source position and the
// watermark in one synced batch (automatically every Options.CommitEvery
// events). After a crash, [Open] reports in [Pipeline.ResumeSeq] where the
// source must restart; re-feeding from there reproduces the uninterrupted
// run. Rows emitted after the last commit are emitted again (at-least-once;
// Row.Seq identifies them), so a sink should make rows durable before the
// commit that covers their events.
//
// # Damaged stores, full disks, memory
//
// [Open] refuses a store whose files do not hold what was committed
// ([ErrStoreDamaged], naming the file: a damaged MANIFEST or table, or
// fewer entity records than the last commit counted), a directory of
// unrelated files ([ErrNotStore]), one another process holds
// ([ErrStoreLocked]) and a disk without room to replay the log
// ([ErrNoSpace]); Options.ReadOnly opens a damaged store for salvage. A
// damaged write-ahead log tail rolls the store back to the last commit
// before the damage: Notices says so and Stats.RolledBack is set, and the
// source resumes from the earlier position. Damage found later is an
// error from the read that found it. Memory is bounded by
// Options.CacheBytes, BlockCacheBytes and MemTableBytes (see CacheBytes).
//
// # Kinds of your own
//
// Every built-in kind is an implementation of the public [Kind] and
// [Aggregate] interfaces; a kind of your own goes through the same seam
// and is stored, expired, replayed and erased like the built-ins. Its
// Describe text and its versioned encoding are its identity in stored
// state: see [Kind] for the contract. Package kindtest checks a kind
// against a brute-force reference with the invariant tests the built-ins
// pass; examples/kinds holds one worked kind.
//
// # Lookups and joins
//
// [Pipeline.Lookup] (and [Live.Lookup]) answer one entity key's features
// as of a time without applying an event, flagging answers older than the
// exact horizon. Package join builds label joins (training rows with
// point-in-time features and matured labels), interval joins and as-of
// joins on a pipeline's rows and watermark (Spec.Emit, Spec.OnWatermark),
// with their state committed in the pipeline's store.
//
// # What it is not
//
// Features are signals for a model or a human reviewer, not verdicts;
// thresholds must be validated on your own labelled data. The state kept
// here is personal data in many jurisdictions: erasure requests and local
// data-protection law apply to it.
//
// # Concurrency
//
// A Pipeline is not safe for concurrent use; [Live] serialises goroutines
// onto one, and has its own Erase, LiftErasure, Snapshot and ResetNewest.
// Spec.Emit and Spec.OnLate must not call back into the pipeline or its
// Live: such a call returns [ErrReentered] and changes nothing.
//
// # Item hashes
//
// Item kinds keep 64-bit hashes of items (Feature.Item) in the records of
// the entities that saw them. They are keyed per store with SipHash-2-4.
// Under the random key a new store draws and keeps, hashes cannot be
// matched across stores or against tables computed in advance; under
// Options.ItemKey, which the store does not keep, the store alone does not
// let anyone test a list of candidate items against them. Two stores give
// the same rows only under the same key: give a backfill the live store's
// [Pipeline.ItemKey]. Stores made before keyed hashing keep unkeyed
// hashes (Notices says so).
package tallyward
