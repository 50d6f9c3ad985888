package tallyward

import (
	"errors"
	"fmt"
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
	// as-of guarantees (see package window).
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
	// minus MaxDisorder. Default: 0.
	MaxDisorder time.Duration

	// FutureSkew rejects events more than this far ahead of the newest
	// event time seen (and, in live mode, of the injected clock).
	// Default: 1 hour.
	FutureSkew time.Duration

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
	// ErrDefinitionChanged. Default: none.
	ResetFeatures []string

	// MetricsClock times commits for Stats. It is read for metrics only,
	// never for any decision about data. Default: SystemClock.
	MetricsClock Clock

	// IdleAdvance, in live mode, raises the watermark to clock − MaxDisorder
	// − IdleAdvance once no event has arrived for IdleAdvance of clock
	// time, so Settled rows are not held forever on a quiet source. Zero
	// disables it. Default: 0.
	IdleAdvance time.Duration
}

// EnsureDefaults fills zero fields with their defaults.
func (o *Options) EnsureDefaults() {
	if o.FutureSkew == 0 {
		o.FutureSkew = time.Hour
	}
	if o.CommitEvery == 0 {
		o.CommitEvery = 100_000
	}
	if o.MetricsClock == nil {
		o.MetricsClock = SystemClock{}
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
	if o.MaxDisorder < 0 {
		errs = append(errs, fmt.Errorf("tallyward: MaxDisorder %v < 0", o.MaxDisorder))
	}
	if o.FutureSkew < 0 {
		errs = append(errs, fmt.Errorf("tallyward: FutureSkew %v < 0", o.FutureSkew))
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
