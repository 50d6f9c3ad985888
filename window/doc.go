// Package window holds pure windowed aggregates over event time: sliding
// count, sum, min, max and mean over epoch-aligned panes; exponentially
// decayed count, sum, mean and variance; a velocity ratio, against a
// longer window (Velocity) or against the entity's own decayed history
// (Surge); first/last seen and gap-based sessions; and tumbling/hopping
// window assignment. It does no I/O, reads no clock and depends on no other
// tallyward package but two internal helpers (the shared decoder and
// saturating arithmetic), so it can be used on its own as a fast sliding
// counter.
//
// # Contract
//
// Time is a parameter. Every call takes event time as int64 Unix
// nanoseconds: Add(t[, v]) records an event, XxxAt(t) answers as of t.
// As-of answers never include an event newer than t. Lengths of time in
// specs (windows, resolutions, half-lives, gaps, horizons) are
// time.Duration. Newest reports the newest time added and whether there is
// one; Count the number of events an aggregate holds.
//
// Constructors NewX(spec) return the aggregate or the errors of
// spec.Validate; a zero spec field means its documented default, and a
// missing required field is an error.
//
// Exactness is bounded by a Horizon: with maxT the newest time added,
// events newer than cutoff = maxT − Horizon are kept with exact times and
// older ones are folded into compact summaries. Queries at t >= cutoff are
// exact, up to the trailing-edge error of pane-based windows: less than one
// pane (Resolution), stated exactly on SlidingCount. Queries older than the
// cutoff are answered conservatively as each type documents. A pipeline
// passes its allowed disorder as Horizon.
//
// Results are a deterministic function of the sequence of calls. Integer
// results (counts) do not depend on the order of events within the
// horizon; float results do up to rounding, because float addition is not
// associative, so bit-identical replay needs a canonical apply order.
//
// Every aggregate encodes its state (never its spec) with AppendBinary and
// restores it with UnmarshalBinary: a version byte first, a kind byte next
// (the byte table is on each UnmarshalBinary), unknown versions and
// trailing bytes rejected with ErrUnknownVersion and ErrTrailingBytes,
// malformed input with ErrCorrupt, all wrapped with context; the receiver is
// unchanged on error and no input makes a decoder panic. The sentinel
// errors are the same values as package sketch's, so errors.Is matches
// across both. Specs report every problem at once from Validate.
//
// # Costs
//
// Add is amortised O(1) and allocation-free in the steady state (storage is
// reused; Reset keeps it): a few nanoseconds for sliding aggregates, tens
// for decayed statistics (one exp2). A sliding query is O(log P + P_w + R)
// for P retained panes, P_w panes in the window and R raw events within the
// horizon. Memory is about 24 bytes per non-empty pane and 16 per raw event
// plus a fixed header; SizeBytes reports it. A 1 h window at 1 min
// resolution holding 10 events encodes in about 30 bytes.
//
// # Building in place
//
// Every aggregate can live by value inside a larger object, so that a
// caller holding many aggregates per entity (the pipeline) makes one
// allocation per entity rather than one per aggregate: Init builds one
// from a spec in place (allocating only its small immutable parameters),
// InitLike builds one like a prototype made by its New function, sharing
// the prototype's parameters, with no validation and no allocation. The
// first pane and raw event are stored inside the value, so an aggregate
// must not be copied once built.
//
// # Not for
//
// Distinct counts, quantiles or heavy hitters (see the sketch package);
// windows shared by many entities (make one aggregate per entity); or
// exact answers far in the past: history older than the horizon is kept
// only at pane (or summary) granularity and panes that leave every
// answerable window are discarded.
//
// # Concurrency
//
// Aggregates are not safe for concurrent use: guard each with a lock, or
// own it from one goroutine. Queries do not modify the state, so concurrent
// queries with no concurrent Add or UnmarshalBinary are safe.
package window
