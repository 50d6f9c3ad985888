// Package kindtest checks an aggregate kind (a [tallyward.Kind] with its
// [tallyward.Aggregate]) against a brute-force reference, with the same
// invariant tests the built-in kinds pass. Call [Run] from a test of the
// package that defines the kind:
//
//	func TestMyKind(t *testing.T) {
//		kindtest.Run(t, kindtest.Config{
//			Kind: MyKind{...},
//			Reference: func(past []kindtest.Event, asOf int64, asking kindtest.Event) float64 {
//				// recompute the answer from the raw events
//			},
//		})
//	}
//
// # What it checks
//
// Run generates seeded random streams: several entity keys (one much
// busier than the others), event times on a grid of Spacing/4 so that ties
// and pane edges occur, occasional long silences, and arrival order
// shuffled within MaxDisorder. Each stream feeds a pipeline whose one
// entity has three features of the kind: one that takes every event, one
// with BeforeEvent, and one that takes a seeded two thirds of the events
// (Feature.Where). Then, as subtests:
//
//   - asof: in Eager and in Settled mode, every value of every row equals
//     the reference computed from the raw events of the row's key that the
//     pipeline had applied with time <= the asked time (the event's time,
//     or one nanosecond before it for BeforeEvent), sorted by time, events
//     at one time in the order the pipeline applied them (Eager: arrival
//     order; Settled: the pipeline's canonical tie-break). No update may be
//     refused as too old and no event may be late.
//   - replay-live: Pipeline.Replay and Live fed by four goroutines through
//     SubmitInOrder, with a fake clock, give bit-identical rows in the same
//     emission order, in both modes.
//   - shuffle: in Settled mode, rows keyed by event are bit-identical for
//     every seeded reordering of the stream within MaxDisorder.
//   - crash: on Pebble's crash-simulating in-memory filesystem (through
//     Options.FS), the pipeline commits every few events, "crashes" at
//     seeded points (the filesystem is cloned as a crash would leave it,
//     with a random share of unsynced writes surviving), reopens on the
//     clone and resumes from ResumeSeq. Rows re-emitted after a restart
//     must equal their first emission, the union of rows must equal an
//     uninterrupted run's, and so must the stored entity records, byte for
//     byte.
//   - encoding: aggregates fed each key's events directly: after every
//     Add (and for the empty aggregate), the encoding is not empty (a
//     version byte comes first), AppendBinary appends the same bytes to a
//     non-empty buffer, SizeBytes is positive, the bytes decode into a
//     fresh aggregate that re-encodes to the same bytes and answers the
//     same as-of values and Newest, and the decoder rejects truncations
//     (all of them for encodings up to 40 bytes, a seeded sample beyond),
//     trailing bytes and a first byte of 255 (an unknown version) with an
//     error, without panicking and without
//     changing the receiver.
//
// The kind's rows are never checked against a hand-written expected value:
// the reference is the outside check, so write it from the kind's
// definition, not from its implementation.
//
// # Cost
//
// The defaults (3 streams of 300 events, 2 with -short; 4 shuffles; 3
// crashes per mode) took 0.1 to 0.25 s per kind with -short for the
// built-in windows, Decayed, Recency and the worked example in
// examples/kinds, 0.4 s for Quantile and about 1 s for Frequency (a
// Count-Min sketch of a few KiB per key), on the project's shared 2-core
// machine; each subtest opens a handful of in-memory Pebble stores. The cache is set to a single byte for half the streams,
// so that every access to another key decodes the stored record: cost
// grows with the size of the kind's encoding. Config.Events and
// Config.Streams scale it up; so does the test flag -kindtest.scale=N,
// which multiplies both for every Config without editing tests:
//
//	go test ./mykind/ -run TestMyKind -kindtest.scale=10
//
// # Reading a failure
//
// Every message names the subtest, the stream's seed and the mode. An
// asof failure gives the feature ("all", "before" or "some"), the event
// (its ID in time order, key, time, item, value), the asked time, the
// answer and the reference's, and the last few past events the reference
// saw; rerun with the same Config to reproduce it. A replay-live or
// shuffle failure prints the first differing row: values are printed as
// their IEEE-754 bits, so a difference in the last bit shows (often a sum
// whose order depends on arrival: make it order-free, or use the
// Settled tie-break's order). A crash failure names the mode, the seed
// and the run (0 before the first crash): differing re-emitted rows mean state after a restart is not the
// state before the crash (usually an encoding that loses something the
// cache had kept); differing records mean the same.
//
// kindtest uses the pipeline only through its public API. To learn the
// order events at one time were applied in, the asof pipelines have a
// second entity (same key) whose one feature records the IDs of the
// events it is given; its inputs join the Settled tie-break, so the
// order differs from a pipeline without it, but is as canonical. To
// compare stored bytes, the harness knows one fact of the store layout:
// entity records are the keys with tag 0x03 (internal/store).
package kindtest
