// Package sketch holds mergeable summaries with versioned binary encodings
// and stated error bounds, for per-entity features: a windowed distinct
// count (Distinct), a distinct count over a whole history (DistinctEver),
// item frequencies (CountMin), heavy hitters (TopK) and relative-error
// quantiles (Quantile). It does no I/O and depends on no other tallyward
// package but two internal helpers (the shared decoder and saturating
// arithmetic).
//
// # Items, time and hashing
//
// Items are 64-bit hashes: Hash and HashString (XXH64, seed 0; no
// allocation). The hash and its seed are part of every format version that
// stores hashes. Times are int64 Unix nanoseconds passed by the caller; the
// package never reads a clock. Windows are cut into panes aligned to the Unix
// epoch, pane(t) = floor(t / Resolution).
//
// # Guarantees
//
//   - Distinct: exact while at most ExactLimit distinct items are live
//     (items are 32-bit fingerprints: collisions below n^2/2^33); above it a
//     HyperLogLog estimate with relative standard error 1.04/sqrt(2^p)
//     (Flajolet et al., AofA 2007). A query at t counts the items with time
//     <= t in the Window/Resolution panes ending with pane(t): the exact
//     window (t-Window, t] less a trailing piece shorter than one pane. It
//     never counts an item newer than t, for any t >= Newest()-Horizon.
//   - CountMin: never underestimates; overestimates by at most Epsilon*N
//     with probability at least 1-Delta (Cormode, Muthukrishnan, 2005).
//   - TopK: Count-Err <= f <= Count per monitored item; every item with
//     f > N/Capacity is monitored (Metwally, Agrawal, El Abbadi, 2005).
//   - Quantile: every estimate within RelativeAccuracy of the exact value
//     of its rank, for positive, negative and zero values, as long as that
//     rank is not in a collapsed bucket (Masson, Rim, Lee, 2019).
//   - DistinctEver: near-exact while its sparse form is small (25-bit
//     indices; Heule, Nunkesser, Hall, EDBT 2013), then relative standard
//     error 1.04/sqrt(2^p); as of any t >= Newest()-Horizon it never counts
//     an item newer than t.
//
// Each type reports its bound: Distinct.RelativeError, CountMin.ErrorBound,
// TopK.ErrorBound, Quantile.RelativeError, DistinctEver.RelativeError.
//
// # Order
//
// CountMin and Quantile are functions of the multiset of adds: any
// arrival order, and any order of Merge, gives identical answers. Distinct
// is too within a mode: its register frontiers and exact entries are
// unions, and promoted items land in the same registers as items added
// after the switch, so two summaries in sketch mode hold identical
// registers. The one order-dependent point is the switch itself: it
// happens at the first add after which more than ExactLimit items are
// live, and near that limit one arrival order may still answer exactly
// while another already estimates. TopK (Space-Saving) is order-dependent
// and its Merge is commutative but not associative. For bit-identical
// Settled results, apply the events of TopK and Distinct in the canonical
// (time, tie-break) order once the watermark passes them, as the pipeline
// does, and do not merge partial TopK summaries. DistinctEver has no Merge;
// its state is a function of the sequence of adds, and its estimate of
// the set it holds, except at the sparse-to-dense switch.
//
// # Encodings
//
// Every type has AppendBinary and UnmarshalBinary. The first byte is the
// format version (1), the second the kind (1 distinct, 2 Count-Min, 3
// Space-Saving, 4 quantile, 5 distinct-ever; frozen, never reused); the
// byte table is in
// each UnmarshalBinary doc comment. Decoders reject unknown versions
// (ErrUnknownVersion), trailing bytes (ErrTrailingBytes) and anything
// malformed (ErrCorrupt), wrapped with context for errors.Is, and leave
// the receiver unchanged on error. The encodings of this package are
// canonical (a decoded summary re-encodes to the same bytes), but a summary
// built by different add orders may still encode differently (TopK), so
// compare answers, not bytes. Version-1 golden blobs live in testdata/ for
// good.
//
// # Costs
//
// Distinct: Add about 45-190 ns amortised and 0 allocations; the per-event
// Add+DistinctAt about 75-275 ns (BenchmarkDistinct; 2 shared cores). An
// exact-mode Add is expected O(1) (a hash probe and a walk of the item's
// entries). Exact mode holds 16 bytes per live (item, pane) entry, the
// first two inside the value, and a summary is 112 bytes with those
// two; Init and InitLike build one in place (InitLike shares a
// prototype's parameters and allocates nothing), so it can live by value
// inside a larger object and must not be copied once built. Sketch mode
// holds 8*2^p bytes of register frontiers plus 2^p bytes per cached view
// (at most three),
// about 33 KiB at the default p=12 and 0.6 MiB at 10M items with p=12
// (frontiers spill beyond four entries). A window start not seen before
// costs one O(2^p) view rebuild (once per pane boundary). CountMin:
// 8*width*depth bytes, Add/Estimate O(depth). TopK: O(log Capacity) per Add.
// Quantile: one logarithm per Add, 8 bytes per bucket. DistinctEver: a few
// bytes per item while sparse, 2*2^p once dense; the per-event Add+DistinctAt
// about 1-6 us, more while a sparse set takes many new items within the
// horizon (BenchmarkDistinctEver; figures on the type).
//
// # What it is not for
//
// Not for exact distinct counts of large sets, not for heavy hitters of
// streams applied in arbitrary order, not for windows longer than 512
// panes (choose a coarser Resolution), and not for sharing one summary
// between goroutines: no type is safe for concurrent use, including
// concurrent queries (queries update caches).
//
// # Windowed distinct: the measured choice
//
// Two designs were measured on the same stream (1 h window of 1 min panes,
// 5 s Horizon, p=12, one event per ms, items cycling through n distinct;
// BenchmarkDistinct against BenchmarkDesignPaneSketches, go test -bench .,
// 2 cores shared with other work; bytes are encoded sizes):
//
//	                              n=10      n=1k      n=100k    n=10M
//	per-pane axiomhq   add        31 ns     1214 ns   65 ns     -
//	                   add+query  2.4 us    541 us    301 us    -
//	                   bytes      3.7 KB    54 KB     250 KB    -
//	sliding registers  add        44 ns     70 ns     93 ns     193 ns
//	                   add+query  76 ns     93 ns     107 ns    275 ns
//	                   bytes      82 B      6.0 KB    29 KB     255 KB
//
// Per-pane sketches must merge the window's panes and estimate on every
// query (about 0.5 ms once panes are dense); the sliding registers keep,
// per register, the frontier of (pane, rho) pairs (Chabchoub, Hebrail,
// "Sliding HyperLogLog", 2010) and a cached per-window histogram, so a
// query costs an O(64) estimate (Ertl's improved estimator) only when a
// register changed, and memory grows with the logarithm of the window's
// pane count rather than linearly. Below ExactLimit both are replaced by
// an exact set with exact times, so small entities never touch registers.
package sketch
