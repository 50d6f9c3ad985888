package scaleout

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"sync/atomic"
	"time"

	"github.com/twmb/franz-go/pkg/kerr"
	"github.com/twmb/franz-go/pkg/kgo"
	"github.com/twmb/franz-go/pkg/kmsg"

	"github.com/tallyward/tallyward"
)

// ErrConfig is wrapped by every error Config.Validate reports.
var ErrConfig = errors.New("scaleout: bad config")

// Config configures a Member. Fields marked required have no default.
type Config[E any] struct {
	// Name identifies this instance in logs and ownership changes.
	// Default: the transactional id, else "member".
	Name string
	// Brokers are the seed brokers of the log. Required.
	Brokers []string
	// Group is the consumer group the instances share. Required.
	Group string
	// Topic is the input topic, keyed by the entity whose features this
	// member computes. Required.
	Topic string
	// Decode turns a record into an event. A record it fails on is
	// skipped and counted (Stats.Undecodable), on every read. Required.
	Decode func(*kgo.Record) (E, error)
	// Spec is the pipeline every partition runs; its Emit (if set) also
	// receives every row. Required: Time and Entities.
	Spec tallyward.Spec[E]
	// Options are each partition pipeline's options; Dir is set per
	// partition, and a zero CommitEvery means no automatic commits (a
	// partition's state is committed with its snapshots; local commits in
	// between would only cost syncs). Default: tallyward's defaults
	// otherwise.
	Options tallyward.Options
	// Dir is the local working directory: one Pebble store per owned
	// partition lives under it while owned. Required.
	Dir string
	// Snapshots is the shared storage partitions are handed over
	// through. Required.
	Snapshots Snapshots
	// OutputTopic, if set, receives one record per row (Encode). Default:
	// "" (rows go to Spec.Emit only).
	OutputTopic string
	// Encode turns a row into the key and value of an output record; the
	// row's Values are only valid during the call. Required with
	// OutputTopic.
	Encode func(part Partition, r tallyward.Row[E]) (key, value []byte)
	// TransactionalID, if set, makes output records, group offsets and
	// the snapshot they match one unit: rows are visible to read-committed
	// consumers exactly once, whatever fails. It must be unique per
	// running instance. Default: "" (output is at-least-once across
	// failures).
	TransactionalID string
	// CommitRecords commits after this many records consumed by this
	// instance since the last commit. Default: 10000.
	CommitRecords int
	// IdleCommit commits pending work after a poll that waited this long
	// for records and got none. Default: 200ms.
	IdleCommit time.Duration
	// MaxPollRecords bounds the records processed between two chances
	// for a rebalance to proceed. Default: 1000.
	MaxPollRecords int
	// ClientOpts are extra franz-go client options (TLS, SASL, timeouts).
	// Default: none.
	ClientOpts []kgo.Opt
	// OnChange is told of every ownership change of this member. It runs
	// on the client's group goroutine and must not block. Default: nil.
	OnChange func(Change)
	// Logger receives what a member has to say beyond its errors.
	// Default: discard.
	Logger *slog.Logger
}

// groupChecks starts a Validate: it returns the function that records a
// problem in errs (wrapping ErrConfig), after checking what every
// configuration that joins a group needs.
func groupChecks(errs *[]error, brokers []string, group string) func(string, ...any) {
	bad := func(f string, a ...any) {
		*errs = append(*errs, fmt.Errorf("%w: "+f, append([]any{ErrConfig}, a...)...))
	}
	if len(brokers) == 0 {
		bad("Brokers is empty")
	}
	if group == "" {
		bad("Group is empty")
	}
	return bad
}

// Validate reports every problem with c at once.
func (c *Config[E]) Validate() error {
	var errs []error
	bad := groupChecks(&errs, c.Brokers, c.Group)
	if c.Topic == "" {
		bad("Topic is empty")
	}
	if c.Decode == nil {
		bad("Decode is nil")
	}
	if c.Spec.Time == nil {
		bad("Spec.Time is nil")
	}
	if c.Dir == "" {
		bad("Dir is empty")
	}
	if c.Snapshots == nil {
		bad("Snapshots is nil")
	}
	if c.OutputTopic != "" && c.Encode == nil {
		bad("OutputTopic %q without Encode", c.OutputTopic)
	}
	if c.OutputTopic == c.Topic && c.Topic != "" {
		bad("OutputTopic is the input topic")
	}
	if c.CommitRecords < 0 || c.MaxPollRecords < 0 || c.IdleCommit < 0 {
		bad("negative CommitRecords, MaxPollRecords or IdleCommit")
	}
	if c.Options.Dir != "" {
		bad("Options.Dir is set per partition; leave it empty")
	}
	return errors.Join(errs...)
}

func (c *Config[E]) ensureDefaults() {
	c.Name = cmpOr(c.Name, c.TransactionalID, "member")
	if c.CommitRecords == 0 {
		c.CommitRecords = 10000
	}
	if c.IdleCommit == 0 {
		c.IdleCommit = 200 * time.Millisecond
	}
	if c.MaxPollRecords == 0 {
		c.MaxPollRecords = 1000
	}
	if c.Options.CommitEvery == 0 {
		c.Options.CommitEvery = -1
	}
	if c.Logger == nil {
		c.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
}

func cmpOr(s ...string) string {
	for _, v := range s {
		if v != "" {
			return v
		}
	}
	return ""
}

// What says what happened to a partition.
type What string

// The ownership changes a member reports.
const (
	Assigned What = "assigned" // the member took the partition over
	Revoked  What = "revoked"  // handed away cleanly, state committed
	Lost     What = "lost"     // taken away without a chance to commit
)

// Change is one ownership change of one member.
type Change struct {
	Member string
	Part   Partition
	What   What
	// Head is the group offset the member resumed from (Assigned) or
	// the last offset its state was committed at (Revoked, Lost); -1
	// when the partition has no committed offset.
	Head int64
	// FromSnapshot is set when Assigned loaded state from Snapshots
	// (false: a partition with no committed offset, started empty).
	FromSnapshot bool
	// Took is how long obtaining and opening the state took (Assigned),
	// by the pipelines' Options.MetricsClock.
	Took time.Duration
}

// Stats counts what a member did.
type Stats struct {
	Consumed    int64 // records read from the input topic
	Undecodable int64 // records Decode refused
	Refused     int64 // events the pipeline rejected or found late
	Commits     int64 // commits that reached the group
	Aborted     int64 // commits the group refused (a rebalance); state rolled back
	Loaded      int64 // partitions taken over from a snapshot
	Produced    int64 // output records produced (including aborted ones)
	Rewound     int64 // seeks back to a state's resume point after a fetch restarted past it
}

// Member is one instance of a scaled-out pipeline: a member of the
// consumer group that runs one pipeline per partition it owns.
//
// Run is called from one goroutine; Close after Run has returned. Stats
// and Owned are safe to call at any time.
type Member[E any] struct {
	cfg Config[E]
	cl  *kgo.Client
	txn *kgo.GroupTransactSession

	mu      sync.Mutex // guards the fields below and every pipeline
	parts   map[int32]*part[E]
	gen     int
	pending int
	inTxn   bool
	fatal   error
	stats   Stats

	blocked atomic.Bool // a rebalance waits for the poll to end
	dead    atomic.Bool // abandoned: callbacks do nothing
	prodErr atomic.Pointer[error]
}

// part is the state of one owned partition.
type part[E any] struct {
	id  Partition
	p   *tallyward.Pipeline[E]
	dir string
	// base is the sequence number of offs[0]; offs holds the offset of
	// every event processed since the last commit's resume point, so a
	// commit can name the offset of its resume sequence number.
	base uint64
	offs []int64
	// head is the offset of the first record not yet consumed; start the
	// first offset consumed by a partition that began empty (-1 if none).
	head, start int64
	// confirmed is the head of the state the group offset names (-1: no
	// committed offset); dirty is set once records were consumed after it.
	confirmed int64
	dirty     bool
	// rewind is the offset the state must be fed from next when it is
	// below confirmed (a Settled state's held events are read again);
	// -1 once a record below confirmed arrived. rewinds counts the
	// seeks made for it and dropped is the last record dropped meanwhile
	// (see reseek).
	rewind, dropped int64
	rewinds         int
}

// NewMember validates cfg and connects a member to the group. It consumes
// nothing until Run.
func NewMember[E any](cfg Config[E]) (*Member[E], error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg.ensureDefaults()
	if err := os.MkdirAll(cfg.Dir, 0o755); err != nil {
		return nil, err
	}
	m := &Member[E]{cfg: cfg, parts: map[int32]*part[E]{}}
	opts := []kgo.Opt{
		kgo.SeedBrokers(cfg.Brokers...),
		kgo.ConsumerGroup(cfg.Group),
		kgo.ConsumeTopics(cfg.Topic),
		kgo.DisableAutoCommit(),
		kgo.BlockRebalanceOnPoll(),
		kgo.ConsumeResetOffset(kgo.NewOffset().AtStart()),
		kgo.FetchIsolationLevel(kgo.ReadCommitted()),
		kgo.OnPartitionsAssigned(func(context.Context, *kgo.Client, map[string][]int32) {}),
		kgo.AdjustFetchOffsetsFn(m.adjust),
		kgo.OnPartitionsRevoked(m.revoked),
		kgo.OnPartitionsLost(m.lost),
		kgo.OnPartitionsCallbackBlocked(func(context.Context, *kgo.Client) { m.blocked.Store(true) }),
	}
	if cfg.OutputTopic != "" {
		opts = append(opts, kgo.DefaultProduceTopic(cfg.OutputTopic))
	}
	if cfg.TransactionalID != "" {
		opts = append(opts, kgo.TransactionalID(cfg.TransactionalID), kgo.RequireStableFetchOffsets())
	}
	opts = append(opts, cfg.ClientOpts...)
	var err error
	if cfg.TransactionalID != "" {
		m.txn, err = kgo.NewGroupTransactSession(opts...)
		if err == nil {
			m.cl = m.txn.Client()
		}
	} else {
		m.cl, err = kgo.NewClient(opts...)
	}
	if err != nil {
		return nil, err
	}
	return m, nil
}

// Stats returns what the member did so far.
func (m *Member[E]) Stats() Stats {
	m.mu.Lock()
	defer m.mu.Unlock()
	return m.stats
}

// Owned lists the partitions the member owns now, in order.
func (m *Member[E]) Owned() []int32 {
	m.mu.Lock()
	defer m.mu.Unlock()
	var ps []int32
	for id := range m.parts {
		ps = append(ps, id)
	}
	sort.Slice(ps, func(i, j int) bool { return ps[i] < ps[j] })
	return ps
}

// Run consumes until ctx ends (it then returns nil, without committing:
// Close commits) or a storage, snapshot or transaction error stops the
// member (returned).
func (m *Member[E]) Run(ctx context.Context) error {
	for ctx.Err() == nil {
		pctx, cancel := context.WithTimeout(ctx, m.cfg.IdleCommit)
		fs := m.cl.PollRecords(pctx, m.cfg.MaxPollRecords)
		cancel()
		if fs.IsClientClosed() {
			return kgo.ErrClientClosed
		}
		err := m.handle(ctx, fs)
		m.cl.AllowRebalance()
		if err != nil {
			return err
		}
	}
	return nil
}

func (m *Member[E]) handle(ctx context.Context, fs kgo.Fetches) error {
	fs.EachError(func(t string, p int32, err error) {
		if !errors.Is(err, context.DeadlineExceeded) && !errors.Is(err, context.Canceled) {
			m.cfg.Logger.Warn("fetch error", "member", m.cfg.Name, "topic", t, "partition", p, "err", err)
		}
	})
	// Records in hand are processed even if ctx has ended: the client
	// already counts them as consumed, and a commit by Close would
	// otherwise move the group offset past records never applied.
	n := fs.NumRecords()
	m.mu.Lock()
	if m.fatal != nil {
		m.mu.Unlock()
		return m.fatal
	}
	if n > 0 && m.txn != nil && !m.inTxn {
		if err := m.txn.Begin(); err != nil {
			m.mu.Unlock()
			return err
		}
		m.inTxn = true
	}
	var err error
	fs.EachRecord(func(r *kgo.Record) {
		if err == nil {
			err = m.process(r)
		}
	})
	if err != nil {
		m.fatal = err
		m.mu.Unlock()
		return err
	}
	m.pending += n
	due := m.pending >= m.cfg.CommitRecords || (n == 0 && m.pending > 0) || (m.blocked.Swap(false) && m.pending > 0)
	m.mu.Unlock()
	if due {
		// A commit under way finishes even when Run is told to stop:
		// abandoning it midway would only make the next owner redo it.
		return m.commit(context.WithoutCancel(ctx))
	}
	return nil
}

// process runs one record through its partition's pipeline. m.mu is held.
func (m *Member[E]) process(r *kgo.Record) error {
	pt := m.parts[r.Partition]
	if pt == nil {
		return fmt.Errorf("scaleout: record of %s/%d, which this member does not own", r.Topic, r.Partition)
	}
	if pt.rewind >= 0 {
		if r.Offset >= pt.confirmed {
			// The fetch started at the group offset, not at the state's
			// resume point: a rebalance after a refused commit restarts
			// fetching at the committed offsets and undoes the seek.
			// Feeding this record would skip the held events for good.
			return m.reseek(pt, r)
		}
		pt.rewind = -1
	}
	m.stats.Consumed++
	if pt.start < 0 && pt.confirmed < 0 {
		pt.start = r.Offset
	}
	pt.head = r.Offset + 1
	pt.dirty = true
	e, err := m.cfg.Decode(r)
	if err != nil {
		m.stats.Undecodable++
		return nil
	}
	pt.offs = append(pt.offs, r.Offset)
	switch err := pt.p.Process(e); {
	case err == nil:
	case errors.Is(err, tallyward.ErrRejected), errors.Is(err, tallyward.ErrLate):
		m.stats.Refused++
	default:
		return fmt.Errorf("scaleout: %s: %w", pt.id, err)
	}
	if e := m.prodErr.Load(); e != nil {
		return *e
	}
	return nil
}

// maxRewinds bounds the seeks back to one partition's resume point: if
// the records there never come (deleted by retention, say), the member
// stops with an error rather than seek forever or skip them.
const maxRewinds = 8

// reseek moves the fetch of pt back to its resume point and drops r
// (fetched again after the records before it). m.mu is held, on the
// polling goroutine.
func (m *Member[E]) reseek(pt *part[E], r *kgo.Record) error {
	if pt.rewinds > 0 && r.Offset > pt.dropped {
		pt.dropped = r.Offset // the rest of a fetch the last seek covers
		return nil
	}
	pt.dropped = r.Offset
	if pt.rewinds++; pt.rewinds > maxRewinds {
		return fmt.Errorf("scaleout: %s: records from offset %d, which the state must read again, were not delivered after %d seeks (the fetch restarts at %d)", pt.id, pt.rewind, maxRewinds, r.Offset)
	}
	m.stats.Rewound++
	m.cfg.Logger.Warn("fetch restarted past the state's resume point; seeking back", "member", m.cfg.Name, "partition", pt.id.String(), "resume", pt.rewind, "offset", r.Offset)
	m.cl.SetOffsets(map[string]map[int32]kgo.EpochOffset{pt.id.Topic: {pt.id.Partition: {Epoch: -1, Offset: pt.rewind}}})
	return nil
}

// commit saves a snapshot of every partition changed since the last
// commit, then commits the group offsets (with the output, in one
// transaction when transactional). It runs on the polling goroutine
// before AllowRebalance, so no rebalance callback runs meanwhile.
func (m *Member[E]) commit(ctx context.Context) error {
	m.mu.Lock()
	saved := map[int32]int64{}
	// offsets are the group offsets this commit may write: a partition's
	// offset only ever names a head a snapshot was saved at. (The client
	// would also commit the position of a partition assigned but not yet
	// consumed from, which names no snapshot.)
	offsets := map[int32]int64{}
	for id, pt := range m.parts {
		if !pt.dirty {
			if pt.confirmed >= 0 {
				offsets[id] = pt.confirmed
			}
			continue
		}
		if err := m.cfg.Snapshots.Save(ctx, pt.id, pt.head, pt.p.Snapshot); err != nil {
			m.fatal = err
			m.mu.Unlock()
			return err
		}
		saved[id], offsets[id] = pt.head, pt.head
	}
	inTxn := m.inTxn
	m.inTxn = false
	m.mu.Unlock()

	ok := true
	switch {
	case m.txn != nil && inTxn:
		var err error
		ok, err = m.txn.End(kgo.PreTxnCommitFnContext(ctx, m.onlySnapshotted(offsets)), kgo.TryCommit)
		if err != nil {
			return m.fail(err)
		}
	case m.txn == nil:
		if m.cfg.OutputTopic != "" {
			if err := m.cl.Flush(ctx); err != nil {
				return m.fail(err)
			}
		}
		if err := m.commitOffsets(ctx, offsets); err != nil {
			// The group moved on: whoever owns the partitions now
			// resumes from the previous snapshot, which Prune kept.
			m.cfg.Logger.Warn("offset commit refused", "member", m.cfg.Name, "err", err)
			ok = false
		}
	}
	if e := m.prodErr.Load(); e != nil {
		return m.fail(*e)
	}

	m.mu.Lock()
	defer m.mu.Unlock()
	m.pending = 0
	if !ok {
		m.stats.Aborted++
		if m.txn != nil {
			return m.resetAll(ctx)
		}
		return nil
	}
	m.stats.Commits++
	for id, head := range saved {
		pt := m.parts[id]
		if pt == nil {
			continue
		}
		pt.confirmed, pt.dirty = head, false
		if err := m.cfg.Snapshots.Prune(ctx, pt.id, head); err != nil {
			m.cfg.Logger.Warn("pruning snapshots", "member", m.cfg.Name, "partition", pt.id.String(), "err", err)
		}
	}
	return nil
}

func (m *Member[E]) fail(err error) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.fatal == nil {
		m.fatal = err
	}
	return m.fatal
}

// resetAll rolls every owned partition back to the state its group offset
// names, after the group refused a commit: the transaction's output was
// aborted, so the records since must be processed again. m.mu is held.
func (m *Member[E]) resetAll(ctx context.Context) error {
	seek := map[int32]kgo.EpochOffset{}
	for id, pt := range m.parts {
		if !pt.dirty {
			continue
		}
		start := pt.start
		m.closePart(pt)
		np, resume, _, err := m.openPart(ctx, pt.id, pt.confirmed)
		if err != nil {
			m.fatal = err
			return err
		}
		if pt.confirmed < 0 {
			resume, np.start = start, -1
		}
		m.parts[id] = np
		if resume >= 0 {
			seek[id] = kgo.EpochOffset{Epoch: -1, Offset: resume}
		}
	}
	if len(seek) > 0 {
		m.cl.SetOffsets(map[string]map[int32]kgo.EpochOffset{m.cfg.Topic: seek})
	}
	return nil
}

// openPart opens the state of part at group offset head: loaded from
// Snapshots, or empty when head < 0. It returns the offset to consume
// from (-1: the group's reset offset). m.mu is held.
func (m *Member[E]) openPart(ctx context.Context, id Partition, head int64) (*part[E], int64, bool, error) {
	m.gen++
	dir := filepath.Join(m.cfg.Dir, fmt.Sprintf("%s-%d-%d", id.Topic, id.Partition, m.gen))
	if err := os.RemoveAll(dir); err != nil {
		return nil, 0, false, err
	}
	loaded := head >= 0
	if loaded {
		if err := m.cfg.Snapshots.Load(ctx, id, head, dir); err != nil {
			return nil, 0, false, fmt.Errorf("scaleout: taking over %s at offset %d: %w", id, head, err)
		}
	}
	pt := &part[E]{id: id, dir: dir, head: head, start: -1, confirmed: head, rewind: -1}
	spec := m.cfg.Spec
	userEmit := spec.Emit
	if m.cfg.OutputTopic != "" {
		spec.Emit = func(r tallyward.Row[E]) {
			if userEmit != nil {
				userEmit(r)
			}
			k, v := m.cfg.Encode(id, r)
			m.stats.Produced++
			m.cl.Produce(context.Background(), &kgo.Record{Key: k, Value: v}, func(_ *kgo.Record, err error) {
				if err != nil {
					m.prodErr.CompareAndSwap(nil, &err)
				}
			})
		}
	}
	opts := m.cfg.Options
	opts.Dir = dir
	p, err := tallyward.Open(spec, opts)
	if err != nil {
		return nil, 0, false, fmt.Errorf("scaleout: opening %s: %w", id, err)
	}
	pt.p = p
	pt.base = p.ResumeSeq()
	resume := int64(-1)
	if loaded {
		c, err := decodeCursor(p.Cursor())
		if err == nil && c.head != head {
			err = fmt.Errorf("%w: snapshot head %d, group offset %d", ErrCursor, c.head, head)
		}
		if err != nil {
			p.Close()
			return nil, 0, false, fmt.Errorf("scaleout: %s: %w", id, err)
		}
		resume, pt.head = c.resume, c.resume
		if resume < head {
			pt.rewind = resume
		}
	}
	p.SetCommitHook(func(cp tallyward.CommitPoint) ([]byte, error) {
		at := func(seq uint64) int64 {
			if i := seq - pt.base; seq >= pt.base && i < uint64(len(pt.offs)) {
				return pt.offs[i]
			}
			return pt.head
		}
		c := cursor{resume: at(cp.Resume), head: at(cp.NextSeq)}
		if cp.Resume > pt.base {
			pt.offs = pt.offs[min(cp.Resume-pt.base, uint64(len(pt.offs))):]
			pt.base = cp.Resume
		}
		return c.encode(), nil
	})
	return pt, resume, loaded, nil
}

// closePart closes a partition's pipeline and removes its local store:
// the next owner, this member included, starts from Snapshots.
func (m *Member[E]) closePart(pt *part[E]) {
	if err := pt.p.Close(); err != nil {
		m.cfg.Logger.Warn("closing partition", "member", m.cfg.Name, "partition", pt.id.String(), "err", err)
	}
	os.RemoveAll(pt.dir)
}

// adjust runs when partitions are assigned, after their group offsets are
// fetched and before fetching starts: it opens each one's state and moves
// the fetch position back to the state's resume point.
func (m *Member[E]) adjust(ctx context.Context, offsets map[string]map[int32]kgo.Offset) (map[string]map[int32]kgo.Offset, error) {
	if m.dead.Load() {
		return offsets, nil
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	for id, off := range offsets[m.cfg.Topic] {
		began := m.now()
		head := off.EpochOffset().Offset
		if head < 0 {
			head = -1
		}
		if old := m.parts[id]; old != nil {
			m.closePart(old)
		}
		pt, resume, loaded, err := m.openPart(ctx, Partition{m.cfg.Topic, id}, head)
		if err != nil {
			m.fatal = err
			return nil, err
		}
		m.parts[id] = pt
		if loaded {
			m.stats.Loaded++
		}
		if resume >= 0 {
			offsets[m.cfg.Topic][id] = kgo.NewOffset().At(resume).WithEpoch(-1)
		}
		m.tell(Change{Part: pt.id, What: Assigned, Head: head, FromSnapshot: loaded, Took: time.Duration(m.now() - began)})
	}
	return offsets, nil
}

// now reads the clock hand-over durations are timed by: the pipelines'
// Options.MetricsClock (the wall clock by default), so tests can inject it.
func (m *Member[E]) now() int64 {
	if c := m.cfg.Options.MetricsClock; c != nil {
		return c.Now()
	}
	return tallyward.SystemClock{}.Now()
}

func (m *Member[E]) tell(c Change) {
	c.Member = m.cfg.Name
	m.cfg.Logger.Info("ownership", "member", c.Member, "partition", c.Part.String(), "what", string(c.What), "head", c.Head)
	if m.cfg.OnChange != nil {
		m.cfg.OnChange(c)
	}
}

// revoked hands partitions away. The polling loop commits before it lets
// a rebalance proceed, so the state normally has nothing pending; if a
// rebalance slipped in between two polls, a plain member commits here,
// while a transactional one cannot (its transaction ends only on the
// polling goroutine) and drops the work, which its aborted transaction
// never made visible.
func (m *Member[E]) revoked(ctx context.Context, cl *kgo.Client, lost map[string][]int32) {
	m.drop(ctx, lost[m.cfg.Topic], m.txn == nil, Revoked)
}

// lost drops partitions without committing: another member may already
// own them.
func (m *Member[E]) lost(ctx context.Context, cl *kgo.Client, lost map[string][]int32) {
	m.drop(ctx, lost[m.cfg.Topic], false, Lost)
}

func (m *Member[E]) drop(ctx context.Context, ids []int32, commit bool, what What) {
	if m.dead.Load() {
		return
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	for _, id := range ids {
		pt := m.parts[id]
		if pt == nil {
			continue
		}
		if pt.dirty && commit {
			if m.cfg.OutputTopic != "" {
				if err := m.cl.Flush(ctx); err != nil {
					m.cfg.Logger.Warn("flushing output on revoke", "member", m.cfg.Name, "err", err)
				}
			}
			if err := m.cfg.Snapshots.Save(ctx, pt.id, pt.head, pt.p.Snapshot); err != nil {
				m.cfg.Logger.Warn("snapshot on revoke", "member", m.cfg.Name, "partition", pt.id.String(), "err", err)
			} else if err := m.commitOne(ctx, id, pt.head); err == nil {
				pt.confirmed, pt.dirty = pt.head, false
			} else {
				m.cfg.Logger.Warn("offset commit on revoke", "member", m.cfg.Name, "partition", pt.id.String(), "err", err)
			}
		}
		m.closePart(pt)
		delete(m.parts, id)
		m.tell(Change{Part: pt.id, What: what, Head: pt.confirmed})
	}
}

// onlySnapshotted rewrites a transaction's offset commit so that it
// names, for the input topic, exactly the partitions of offsets at their
// heads.
func (m *Member[E]) onlySnapshotted(offsets map[int32]int64) func(*kmsg.TxnOffsetCommitRequest) error {
	return func(req *kmsg.TxnOffsetCommitRequest) error {
		topics := req.Topics[:0]
		for _, t := range req.Topics {
			if t.Topic == m.cfg.Topic {
				kept := t.Partitions[:0]
				for _, p := range t.Partitions {
					if h, ok := offsets[p.Partition]; ok {
						if p.Offset != h {
							p.Offset, p.LeaderEpoch = h, -1
						}
						kept = append(kept, p)
					}
				}
				t.Partitions = kept
			}
			if len(t.Partitions) > 0 {
				topics = append(topics, t)
			}
		}
		req.Topics = topics
		return nil
	}
}

// commitOne commits one partition's group offset, outside a transaction.
func (m *Member[E]) commitOne(ctx context.Context, id int32, head int64) error {
	return m.commitOffsets(ctx, map[int32]int64{id: head})
}

// commitOffsets commits group offsets of the input topic, outside a
// transaction.
func (m *Member[E]) commitOffsets(ctx context.Context, offsets map[int32]int64) error {
	if len(offsets) == 0 {
		return nil
	}
	eo := map[int32]kgo.EpochOffset{}
	for id, h := range offsets {
		eo[id] = kgo.EpochOffset{Epoch: -1, Offset: h}
	}
	var err error
	m.cl.CommitOffsetsSync(ctx, map[string]map[int32]kgo.EpochOffset{m.cfg.Topic: eo},
		func(_ *kgo.Client, _ *kmsg.OffsetCommitRequest, resp *kmsg.OffsetCommitResponse, e error) {
			err = e
			if resp == nil {
				return
			}
			for _, t := range resp.Topics {
				for _, p := range t.Partitions {
					if e := kerr.ErrorForCode(p.ErrorCode); e != nil && err == nil {
						err = e
					}
				}
			}
		})
	return err
}

// Close commits what is pending, leaves the group (handing every
// partition over cleanly) and closes the member's pipelines.
func (m *Member[E]) Close(ctx context.Context) error {
	m.mu.Lock()
	pending, fatal := m.pending > 0, m.fatal
	m.mu.Unlock()
	var err error
	if pending && fatal == nil {
		err = m.commit(ctx)
	}
	m.cl.CloseAllowingRebalance()
	m.closeAll()
	return err
}

// closeAll closes every owned partition's pipeline and local store.
func (m *Member[E]) closeAll() {
	m.mu.Lock()
	defer m.mu.Unlock()
	for id, pt := range m.parts {
		m.closePart(pt)
		delete(m.parts, id)
	}
}

// abandon stops the member as a crash would: no commit, no hand-over, the
// open transaction aborted (as the broker does when it times out), the
// local stores gone.
func (m *Member[E]) abandon(ctx context.Context) {
	m.dead.Store(true)
	if m.txn != nil && m.inTxn {
		m.txn.End(ctx, kgo.TryAbort)
	}
	m.cl.Close()
	m.closeAll()
}
