package tallyward

import (
	"cmp"
	"errors"
	"fmt"
	"log/slog"
	"time"

	"github.com/cockroachdb/pebble/v2/vfs"
)

// Mode selects when a pipeline emits an event's features.
//
// Persisted nowhere; the values are still frozen so logs and configs stay
// readable across versions.
type Mode uint8

const (
	// Eager returns an event's features at once, as of the event's time,
	// over every event already applied. The result depends on the arrival
	// sequence. For inline scoring.
	Eager Mode = 0
	// Settled holds each event until the watermark passes its time, applies
	// held events in canonical (time, tie-break) order and then emits them.
	// The result depends only on the multiset of events for any arrival
	// order within MaxDisorder.
	Settled Mode = 1
)

func (m Mode) String() string {
	switch m {
	case Eager:
		return "eager"
	case Settled:
		return "settled"
	}
	return fmt.Sprintf("Mode(%d)", m)
}

// Lateness is the policy for an event whose time is below the watermark on
// arrival. Whatever the policy, the event is counted in Stats.Late.
type Lateness uint8

const (
	// DropLate counts the event and discards it; Process returns ErrLate.
	DropLate Lateness = 0
	// ApplyLate applies the event to state and emits its features at once,
	// marked late. Window aggregates answer it within their stated
	// as-of guarantees (see package window). Expiry (Options.TTL) is
	// judged by the newest event time less MaxDisorder, not the late
	// event's time: an entity idle for its TTL by now reads as new even
	// if it was alive at that time, so the answer does not depend on
	// when a commit removed the record.
	ApplyLate Lateness = 1
	// DivertLate hands the event to Spec.OnLate and does not apply it.
	DivertLate Lateness = 2
)

func (l Lateness) String() string {
	switch l {
	case DropLate:
		return "drop"
	case ApplyLate:
		return "apply"
	case DivertLate:
		return "divert"
	}
	return fmt.Sprintf("Lateness(%d)", l)
}

// Options configures a Pipeline. The zero value is valid: Eager emission,
// no disorder allowed, late events dropped, an in-memory store.
type Options struct {
	// Mode selects Eager or Settled emission. Default: Eager.
	Mode Mode

	// MaxDisorder is how far behind the newest event time an event may
	// arrive and still not be late: the watermark is the newest event time
	// minus MaxDisorder. Stored state is shaped by it (aggregates keep
	// events exact for that long), so the store records it and a later
	// change is a definition change of every feature (see ResetFeatures).
	// Default: 0.
	MaxDisorder time.Duration

	// FutureSkew rejects events more than this far ahead of the newest
	// event time seen (and, in live mode, of the injected clock).
	// Default: 1 hour.
	FutureSkew time.Duration

	// PastSkew, in live mode, rejects events more than this far behind the
	// injected clock (reason PastTime): with a correct clock, an event
	// from months ago is a broken producer, not history. Longer than the
	// usual retention of a message log, so a consumer catching up on its
	// backlog is not refused. Replay has no clock and is not affected.
	// Negative disables the check. Default: 30 days.
	PastSkew time.Duration

	// EarliestTime and LatestTime bound plausible event times (Unix
	// nanoseconds, inclusive). An event outside them is rejected (reason
	// OutOfRange) before it can move the newest event time: one stray
	// time of -1, of seconds read as nanoseconds, or of the year 2200
	// would otherwise make every later event late or too far in the
	// future. Set math.MinInt64 or math.MaxInt64 to lift a bound.
	// Default: 2000-01-01T00:00:00Z and 2100-01-01T00:00:00Z.
	EarliestTime, LatestTime int64

	// Lateness is the policy for late events. Default: DropLate.
	Lateness Lateness

	// Dir is the Pebble directory. Empty means an in-memory store that is
	// discarded on Close. Default: "".
	Dir string

	// FS overrides the filesystem the store writes through. It is the one
	// place a type of the storage engine (Pebble's vfs.FS) appears in this
	// API, kept because it is the sanctioned way to run a pipeline on a
	// crash-simulating or fault-injecting filesystem in tests; production
	// code leaves it nil. Default: the OS filesystem when Dir is set, a
	// fresh in-memory one otherwise.
	FS vfs.FS

	// CacheBytes bounds the approximate memory of entity records: decoded
	// ones in the cache, and changed ones evicted before the next commit.
	// When changes waiting for a commit would exceed half of it, the
	// pipeline commits early (as an automatic commit, also when
	// CommitEvery is negative). The process's memory is about CacheBytes
	// + BlockCacheBytes + 4 × MemTableBytes, times Go's garbage collector
	// overhead (see DEVELOPERS.md for measurements). Default: 256 MiB.
	CacheBytes int64

	// BlockCacheBytes is the storage engine's cache of table blocks read
	// from disk. Default: 32 MiB.
	BlockCacheBytes int64

	// MemTableBytes is the size of one of the storage engine's in-memory
	// write buffers; up to four exist at once. Default: 64 MiB.
	MemTableBytes int64

	// ReadOnly opens an existing store for inspection or salvage: events
	// can be processed, but nothing is written (Commit returns
	// ErrReadOnly, Close does not commit), and damage that Open would
	// refuse with ErrStoreDamaged is reported by Notices instead.
	// Default: false.
	ReadOnly bool

	// IngestThreshold: a commit of at least this many writes goes to
	// Pebble as one ingested table rather than a batch (cheaper for large
	// commits; see internal/store). Negative: always a batch.
	// Default: 16384 writes.
	IngestThreshold int

	// Workers splits the entity records by key hash over this many
	// goroutines, so one pipeline uses several cores. Rows, their order
	// and the stored state are the same for every value (each record
	// still sees its events in the same order). With more than one,
	// Process hands events on in batches: in Eager mode an event's row
	// reaches Spec.Emit (and Spec.OnLate, Spec.OnWatermark their
	// callbacks, in the same order as with one) by the time a later call
	// other than Process returns (Score, Commit, Advance, Flush, Feed,
	// Lookup, Close ...), or once a batch fills, not before Process
	// returns; Live.Tick delivers them too, and Live.Run whenever its
	// channel is empty. Score answers at once either way. Default: 1
	// (rows emitted within Process): more workers change when Emit runs,
	// so they are asked for (the replay command asks for one per core).
	// The workers are goroutines that Close stops.
	Workers int

	// CommitEvery commits automatically after this many source events.
	// Negative disables automatic commits. Default: 100000.
	CommitEvery int

	// TTL expires an entity's record once the watermark is this far past
	// the newest event applied to it: its features then read as for a new
	// entity, and the record is deleted at a later commit. Expiry follows
	// event time only, so replay and live expire identically. Negative
	// disables expiry. Default: per entity, the longest reach of its
	// features (a sliding window's length, 64 half-lives of a decayed
	// statistic, ...) plus MaxDisorder; an entity with a feature of
	// unbounded reach (first seen) never expires by default.
	TTL time.Duration

	// ResetFeatures lists features ("entity.feature") whose stored definition may
	// differ from the given one: on Open their state is discarded and
	// starts empty, and Notices says a backfill is needed. A changed, new
	// or removed feature that is not listed makes Open fail with
	// ErrDefinitionChanged; a changed MaxDisorder changes every feature.
	// A name that is neither a feature of the spec nor a stored one makes
	// Open fail with ErrUnknownFeature. Default: none.
	ResetFeatures []string

	// ItemKey is the 16-byte key Feature.Item values are hashed with
	// (SipHash-2-4), so that the item hashes kept in other entities'
	// records cannot be tested against candidate items without it. A new
	// store made without ItemKey draws a random key and keeps it (its
	// snapshots carry it; Pipeline.ItemKey returns it), so whoever holds
	// the store holds the key; a store made with ItemKey keeps only a
	// check value, and every later Open must pass the same key. Set it
	// also to give two stores the same rows, e.g. a backfill compared
	// with a live store. A store made before keyed hashing keeps hashing
	// without a key (Notices says so) and refuses a key. Default: nil.
	ItemKey []byte

	// UnkeyedItems makes a new store hash items without a key (XXH64),
	// like stores made before keyed hashing: only to build a store that
	// must give the same rows as such an older one. Default: false.
	UnkeyedItems bool

	// MetricsClock times commits for Stats. It is read for metrics only,
	// never for any decision about data. Default: SystemClock.
	MetricsClock Clock

	// Logger receives what the pipeline has to say beyond its return
	// values: features reset on Open, events the live driver's Run rejects
	// (which it counts and does not return), and the storage engine's own
	// messages (attribute component=pebble). Default: discard.
	Logger *slog.Logger

	// IdleAdvance, in live mode, raises the watermark to clock − MaxDisorder
	// − IdleAdvance once no event has arrived for IdleAdvance of clock
	// time, so Settled rows are not held forever on a quiet source. Zero
	// disables it. Default: 0.
	IdleAdvance time.Duration
}

// Default plausible event times: 2000-01-01 and 2100-01-01, UTC.
const (
	defaultEarliest = int64(946_684_800) * int64(time.Second)
	defaultLatest   = int64(4_102_444_800) * int64(time.Second)
)

// EnsureDefaults fills zero fields with their defaults.
func (o *Options) EnsureDefaults() {
	if o.FutureSkew == 0 {
		o.FutureSkew = time.Hour
	}
	if o.PastSkew == 0 {
		o.PastSkew = 30 * 24 * time.Hour
	}
	if o.EarliestTime == 0 {
		o.EarliestTime = defaultEarliest
	}
	if o.LatestTime == 0 {
		o.LatestTime = defaultLatest
	}
	if o.CommitEvery == 0 {
		o.CommitEvery = 100_000
	}
	if o.Workers == 0 {
		o.Workers = 1
	}
	if o.MetricsClock == nil {
		o.MetricsClock = SystemClock{}
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
}

// Validate reports every problem with o at once.
func (o *Options) Validate() error {
	var errs []error
	if o.Mode > Settled {
		errs = append(errs, fmt.Errorf("tallyward: unknown Mode %d", o.Mode))
	}
	if o.Lateness > DivertLate {
		errs = append(errs, fmt.Errorf("tallyward: unknown Lateness %d", o.Lateness))
	}
	if o.Workers < 0 || o.Workers > MaxWorkers {
		errs = append(errs, fmt.Errorf("tallyward: Workers %d outside [0, %d]", o.Workers, MaxWorkers))
	}
	if o.MaxDisorder < 0 {
		errs = append(errs, fmt.Errorf("tallyward: MaxDisorder %v < 0", o.MaxDisorder))
	}
	if o.FutureSkew < 0 {
		errs = append(errs, fmt.Errorf("tallyward: FutureSkew %v < 0", o.FutureSkew))
	}
	if lo, hi := cmp.Or(o.EarliestTime, defaultEarliest), cmp.Or(o.LatestTime, defaultLatest); lo > hi {
		errs = append(errs, fmt.Errorf("tallyward: EarliestTime %d > LatestTime %d", lo, hi))
	}
	if o.ItemKey != nil && len(o.ItemKey) != ItemKeySize {
		errs = append(errs, fmt.Errorf("tallyward: ItemKey has %d bytes, want %d", len(o.ItemKey), ItemKeySize))
	}
	if o.ItemKey != nil && o.UnkeyedItems {
		errs = append(errs, errors.New("tallyward: ItemKey and UnkeyedItems are both set"))
	}
	if o.CacheBytes < 0 {
		errs = append(errs, fmt.Errorf("tallyward: CacheBytes %d < 0", o.CacheBytes))
	}
	if o.BlockCacheBytes < 0 {
		errs = append(errs, fmt.Errorf("tallyward: BlockCacheBytes %d < 0", o.BlockCacheBytes))
	}
	if o.MemTableBytes < 0 || o.MemTableBytes >= 4<<30 {
		errs = append(errs, fmt.Errorf("tallyward: MemTableBytes %d outside [0, 4 GiB)", o.MemTableBytes))
	}
	if o.IdleAdvance < 0 {
		errs = append(errs, fmt.Errorf("tallyward: IdleAdvance %v < 0", o.IdleAdvance))
	}
	return errors.Join(errs...)
}

// MaxWorkers bounds Options.Workers.
const MaxWorkers = 256
