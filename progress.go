package tallyward

import (
	"encoding/binary"
	"fmt"
	"math"
	"time"

	"github.com/tallyward/tallyward/internal/store"
	"github.com/tallyward/tallyward/internal/wire"
)

// counters are the pipeline's running totals; they are committed with the
// state so that Stats survive a restart exactly.
type counters struct {
	events   uint64 // source events consumed (not counting re-reads)
	applied  uint64 // events applied to state
	emitted  uint64 // rows emitted
	late     uint64 // events below the watermark on arrival
	tooOld   uint64 // feature updates an aggregate refused as older than it keeps
	rejected [numReasons]uint64

	live        int64  // entity records in the store
	expired     uint64 // records removed by expiry
	erased      uint64 // records removed by Erase
	erasedSkips uint64 // entity updates skipped because the key was erased
}

// progress is the pipeline's part of a commit Mark (Mark.Extra).
type progress struct {
	hasMax  bool
	maxT    int64
	flushed bool
	c       counters
	// resumeNewest is the newest event time just before the resume
	// point: re-reading rebuilds the newest time from it.
	resumeNewest newestTime
	skipReread   []uint64
	hasReset     bool
	resetSeq     uint64
	resetTo      int64
	resetWm      int64
}

const (
	progressVersion1 = 1 // future-rejected seqs; newest at resume implied
	progressVersion2 = 2
)

func (p *Pipeline[E]) progress() progress {
	return progress{hasMax: p.hasMax, maxT: p.maxT, flushed: p.flushed, c: p.c, skipReread: p.skipReread,
		resumeNewest: newestTime{p.hasMax, p.maxT}, hasReset: p.hasReset, resetSeq: p.resetSeq, resetTo: p.resetTo.t, resetWm: p.resetWm}
}

// append encodes pr:
//
//	byte     version (2)
//	byte     flags: 1 = has newest time, 2 = flushed, 4 = has newest time
//	         at the resume point, 8 = a ResetNewest at or after it
//	varint   newest event time
//	varint   newest event time just before the resume point
//	uvarint  events, applied, emitted, late, tooOld, live, expired,
//	         erased, erasedSkips
//	uvarint  number of reasons r, then r uvarint rejection counts
//	uvarint  number of seqs to skip on re-read k, then k
//	         uvarint deltas
//	if flag 8: uvarint seq of the reset, varint the newest time it set,
//	         varint the highest watermark before it
//
// Version 1 had no flags 4 and 8, no second time and no reset; its list
// held every future-rejected seq at or after the resume point, and it
// decodes with the newest time at resume taken as the newest time (exact:
// the list covers every event that time would judge differently).
func (pr progress) append(dst []byte) []byte {
	dst = append(dst, progressVersion2)
	var flags byte
	if pr.hasMax {
		flags |= 1
	}
	if pr.flushed {
		flags |= 2
	}
	if pr.resumeNewest.has {
		flags |= 4
	}
	if pr.hasReset {
		flags |= 8
	}
	dst = append(dst, flags)
	dst = binary.AppendVarint(dst, pr.maxT)
	dst = binary.AppendVarint(dst, pr.resumeNewest.t)
	for _, v := range []uint64{pr.c.events, pr.c.applied, pr.c.emitted, pr.c.late, pr.c.tooOld,
		uint64(max(pr.c.live, 0)), pr.c.expired, pr.c.erased, pr.c.erasedSkips} {
		dst = binary.AppendUvarint(dst, v)
	}
	dst = binary.AppendUvarint(dst, numReasons)
	for _, v := range pr.c.rejected {
		dst = binary.AppendUvarint(dst, v)
	}
	dst = binary.AppendUvarint(dst, uint64(len(pr.skipReread)))
	prev := uint64(0)
	for _, s := range pr.skipReread {
		dst = binary.AppendUvarint(dst, s-prev)
		prev = s
	}
	if pr.hasReset {
		dst = binary.AppendUvarint(dst, pr.resetSeq)
		dst = binary.AppendVarint(dst, pr.resetTo)
		dst = binary.AppendVarint(dst, pr.resetWm)
	}
	return dst
}

// decode reads what append wrote; pr is unchanged on error. Layout,
// version 1 (docs/formats.md lists every layout):
//
//	byte     version (1)
//	byte     flags: 1 = has newest time, 2 = flushed
//	varint   newest event time
//	uvarint  events, applied, emitted, late, tooOld, live, expired,
//	         erased, erasedSkips
//	uvarint  number of reasons r, then r uvarint rejection counts (counts
//	         of reasons this build does not know are read and dropped)
//	uvarint  number of future-rejected seqs k, then k uvarint deltas
//	then end of input
func (pr *progress) decode(b []byte) error {
	d := wire.Decoder{B: b}
	v := d.Byte()
	if d.Err == nil && v != progressVersion1 && v != progressVersion2 {
		return fmt.Errorf("%w: progress version %d", store.ErrCorrupt, v)
	}
	var out progress
	flags := d.Byte()
	if d.Err == nil && (v == progressVersion1 && flags > 3 || flags > 15) {
		return fmt.Errorf("%w: progress flags %#x", store.ErrCorrupt, flags)
	}
	out.hasMax, out.flushed = flags&1 != 0, flags&2 != 0
	out.maxT = d.Varint()
	if v == progressVersion1 {
		out.resumeNewest = newestTime{out.hasMax, out.maxT}
	} else {
		out.resumeNewest = newestTime{flags&4 != 0, d.Varint()}
	}
	var live uint64
	for _, v := range []*uint64{&out.c.events, &out.c.applied, &out.c.emitted, &out.c.late, &out.c.tooOld,
		&live, &out.c.expired, &out.c.erased, &out.c.erasedSkips} {
		*v = d.Uvarint()
	}
	out.c.live = int64(min(live, math.MaxInt64))
	nr := d.Uvarint()
	for i := uint64(0); i < nr && d.Err == nil; i++ {
		v := d.Uvarint()
		if i < numReasons {
			out.c.rejected[i] = v
		}
	}
	k := d.Uvarint()
	if d.Err == nil && k > uint64(len(d.B)) {
		return fmt.Errorf("%w: progress: %d seqs to skip in %d bytes", store.ErrCorrupt, k, len(d.B))
	}
	prev := uint64(0)
	for i := uint64(0); i < k && d.Err == nil; i++ {
		prev += d.Uvarint()
		out.skipReread = append(out.skipReread, prev)
	}
	if flags&8 != 0 {
		out.hasReset = true
		out.resetSeq = d.Uvarint()
		out.resetTo = d.Varint()
		out.resetWm = d.Varint()
	}
	if err := d.Finish(); err != nil {
		return fmt.Errorf("%w: progress: %w", store.ErrCorrupt, err)
	}
	*pr = out
	return nil
}

// restore resumes from a stored Mark.
func (p *Pipeline[E]) restore(m store.Mark) error {
	if len(m.Extra) == 0 {
		return nil
	}
	var pr progress
	if err := pr.decode(m.Extra); err != nil {
		return err
	}
	p.hasMax, p.maxT, p.flushed, p.c, p.skipReread = pr.hasMax, pr.maxT, pr.flushed, pr.c, pr.skipReread
	p.rr = pr.resumeNewest
	p.hasReset, p.resetSeq, p.resetTo, p.resetWm = pr.hasReset, pr.resetSeq, newestTime{true, pr.resetTo}, pr.resetWm
	p.wm = m.Watermark
	p.seen = m.Resume
	p.reread = m.Seen
	p.lastCommitSeen = m.Seen
	return nil
}

// Stats is a snapshot of a pipeline's counters and gauges.
type Stats struct {
	Events   uint64 // source events consumed
	Applied  uint64 // events applied to state
	Emitted  uint64 // rows emitted
	Late     uint64 // events below the watermark on arrival (any policy)
	TooOld   uint64 // feature updates refused as older than an aggregate keeps
	Rejected map[Reason]uint64
	// LiveEntities is the number of entity records stored; Expired and
	// Erased count records removed by TTL and by Erase; ErasedSkips
	// counts entity updates skipped because the key had been erased.
	LiveEntities int64
	Expired      uint64
	Erased       uint64
	ErasedSkips  uint64
	Held         int   // Settled: events waiting for the watermark
	Newest       int64 // newest event time seen (0 if none)
	// Watermark is the current watermark; WatermarkLag is Newest minus it
	// (math.MaxInt64 before any event has advanced it).
	Watermark    int64
	WatermarkLag int64
	NextSeq      uint64 // sequence number the next event will get
	CachedKeys   int    // entity records held in memory
	CachedBytes  int64  // their approximate memory
	CacheHits    uint64
	CacheMisses  uint64
	Commits      uint64 // commits since Open that are durable
	// LastCommitDuration and TotalCommitDuration are the time the caller
	// spent in the last commit and in all commits since Open (by
	// Options.MetricsClock; for metrics only). An automatic commit is
	// written in the background: its caller's time is the sweep, the cut,
	// and any wait for the previous commit to land.
	LastCommitDuration  time.Duration
	TotalCommitDuration time.Duration
	// CommitCounts counts the commits since Open by latency:
	// CommitCounts[i] those that took at most CommitBuckets[i] (and more
	// than the bound before it), the last element those slower than every
	// bound.
	CommitCounts [len(CommitBuckets) + 1]uint64
	DiskBytes    uint64 // Pebble's estimate of the store's size
	// RolledBack: Open found the store's newest log damaged and resumed
	// from the last commit before the damage (Notices says where).
	RolledBack bool
}

// CommitBuckets are the upper bounds of Stats.CommitCounts, from a synced
// write of a few records to a commit of a large working set.
var CommitBuckets = [...]time.Duration{
	500 * time.Microsecond, time.Millisecond, 2500 * time.Microsecond, 5 * time.Millisecond,
	10 * time.Millisecond, 25 * time.Millisecond, 50 * time.Millisecond, 100 * time.Millisecond,
	250 * time.Millisecond, 500 * time.Millisecond, time.Second, 2500 * time.Millisecond,
	5 * time.Second, 10 * time.Second,
}

func commitBucket(d time.Duration) int {
	for i, b := range CommitBuckets {
		if d <= b {
			return i
		}
	}
	return len(CommitBuckets)
}

// HitRate is the share of record lookups served by the cache (NaN before
// any lookup).
func (s Stats) HitRate() float64 {
	return float64(s.CacheHits) / float64(s.CacheHits+s.CacheMisses)
}

// Stats returns the current counters. It costs a few dozen loads and one
// small map allocation.
//
// With Options.Workers > 1, the event counts cover the rows delivered so
// far (see Options.Workers); the cache figures wait for the workers.
func (p *Pipeline[E]) Stats() Stats {
	p.joinWork()
	p.syncSwept()
	s := Stats{
		Events: p.c.events, Applied: p.c.applied, Emitted: p.c.emitted, Late: p.c.late, TooOld: p.c.tooOld,
		LiveEntities: p.c.live, Expired: p.c.expired, Erased: p.c.erased, ErasedSkips: p.c.erasedSkips,
		Rejected: map[Reason]uint64{}, Held: p.held.Len(), Watermark: p.wm, NextSeq: p.seen,
		Commits: p.store.Commits(), CachedBytes: p.store.CachedBytes(), DiskBytes: p.store.DiskBytes(),
		LastCommitDuration: time.Duration(p.lastCommitNanos), TotalCommitDuration: time.Duration(p.commitNanos),
		CommitCounts: p.commitHist,
		RolledBack:   p.store.RolledBack(),
	}
	for r, n := range p.c.rejected {
		s.Rejected[Reason(r)] = n
	}
	if p.hasMax {
		s.Newest = p.maxT
	}
	s.WatermarkLag = math.MaxInt64
	if p.hasMax && p.wm != math.MinInt64 && p.wm != math.MaxInt64 {
		s.WatermarkLag = p.maxT - p.wm
	}
	for _, es := range p.ents {
		for _, tb := range es.parts {
			h, m, _ := tb.CacheStats()
			s.CacheHits += h
			s.CacheMisses += m
			s.CachedKeys += tb.Len()
		}
	}
	return s
}
