package window

// SlidingCount counts events in a sliding window over event time.
//
// Let r = Resolution, n = Window/r, pane(t) = floor(t/r) (epoch-aligned),
// maxT = the newest time added, cutoff = maxT − Horizon.
//
// Storage. Events with time > cutoff are kept raw with their exact times
// (sorted; inserts usually land at the end). Events with time <= cutoff are
// folded into per-pane aggregates; only non-empty panes are stored. When
// maxT advances, raw events now <= cutoff are folded (amortised). Panes that
// can no longer fall inside any answerable window (older than
// pane(cutoff) − n + 1, the floor) are discarded. Add of a time whose pane
// is older than the floor returns false and changes nothing.
//
// Queries at t >= cutoff. CountAt(t) counts exactly the events with
// pane(ti) in [pane(t) − n + 1, pane(t)] and ti <= t. It never counts an
// event newer than t. The counted span is [paneStart(t) − Window + r, t],
// where paneStart(t) = pane(t)·r, instead of the exact (t − Window, t]: the
// trailing edge misses the events with times in
// (t − Window, paneStart(t) − Window + r), a span of
// paneStart(t) + r − 1 − t ns, less than one pane. It is exact when t is the
// last nanosecond of its pane (t mod r = r − 1) and misses r − 1 ns of old
// time when t is the first (t mod r = 0). It never includes an event at or
// before t − Window.
//
// Queries at t < cutoff (older than the exact horizon). Folded panes cannot
// tell times apart inside a pane, so only the retained panes strictly before
// pane(t) are counted, i.e. pane(ti) in [max(pane(t) − n + 1, floor),
// pane(t) − 1], and no raw event. The answer still never counts an event
// newer than t; it undercounts by the events of pane(t) with ti <= t, and by
// any events of panes already discarded below the floor.
//
// Build with NewSlidingCount; Reset makes it reusable without allocating.
// The zero value is unusable but safe: it ignores Add (returns false),
// answers 0 and fails to encode or decode with ErrInvalidSpec. Nothing
// panics.
//
// Not safe for concurrent use.
type SlidingCount struct{ ring }

// NewSlidingCount returns an empty count over spec, or the errors of
// spec.Validate.
func NewSlidingCount(spec SlidingSpec) (*SlidingCount, error) {
	c := &SlidingCount{}
	if err := c.Init(spec); err != nil {
		return nil, err
	}
	return c, nil
}

// Init makes c an empty count over spec in place, whatever c held, or
// returns the errors of spec.Validate (c is then unusable, like the zero
// value). A count can so live by value inside a larger object (one
// allocation for many aggregates): its first panes and raw events are
// stored inside the value, so c must not be copied afterwards. Init
// allocates the count's small immutable parameters; InitLike shares
// those of a count already built, with no allocation. The sliding sum,
// min, max and mean have the same Init and InitLike.
func (c *SlidingCount) Init(spec SlidingSpec) error { return c.init(spec, opCount, kindSlidingCount) }

// InitLike makes c an empty count with the spec proto was built with,
// sharing proto's immutable parameters: no validation, no allocation. c
// must not be copied afterwards. The sliding sum, min, max and mean have
// the same InitLike.
func (c *SlidingCount) InitLike(proto *SlidingCount) { c.initLike(proto.sh) }

// Add records one event at time t. It returns false, changing nothing, when
// pane(t) is older than the floor (see the type doc); the caller counts the
// drop.
func (c *SlidingCount) Add(t int64) bool { return c.add(t, 0) }

// CountAt returns the number of events in the window as of t; see the type
// doc for the exact set counted.
func (c *SlidingCount) CountAt(t int64) uint64 {
	n, _ := c.queryAll(t)
	return n
}
