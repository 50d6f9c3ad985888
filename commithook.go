package tallyward

import "github.com/tallyward/tallyward/internal/store"

// CommitPoint describes a commit that is about to be written.
type CommitPoint struct {
	// Resume is the sequence number a restarted source will start at:
	// ResumeSeq() once this commit is durable. Events from Resume up to
	// NextSeq are re-read after a restart (Settled events still held)
	// without being counted or emitted twice.
	Resume uint64
	// NextSeq is the sequence number of the next event: every event
	// below it has been consumed.
	NextSeq uint64
	// Watermark is the watermark the commit stores.
	Watermark int64
	// Emitted is the count of rows emitted (Stats.Emitted), all of which
	// the commit covers.
	Emitted uint64
}

// SetCommitHook installs fn, called inside every Commit (including the
// automatic ones, and those of Close, Erase and Snapshot) after the
// commit's resume point is known and before any state is written. It is
// how output becomes exactly-once: fn makes every row emitted so far
// durable (a file sink flushes and syncs) and returns the cursor to store
// atomically with the state; the cursor then names the sink's committed
// length and the source position at Resume, so a restarted run truncates
// its output to what this commit covers and re-reads its input from
// Resume. A nil cursor keeps the one given to Commit (or the stored one).
//
// Automatic commits may write the state in the background after fn
// returns; a crash before that write lands resumes from the commit
// before, whose cursor names a shorter committed length, so the order
// (output durable first, state second) still holds.
//
// If fn fails, the commit is not written and the pipeline fails: later
// calls return the error. fn runs on the goroutine that called Commit (or
// Process) and must not call back into the pipeline: such a call returns
// ErrReentered. nil removes the hook.
func (p *Pipeline[E]) SetCommitHook(fn func(CommitPoint) (cursor []byte, err error)) {
	p.beforeCommit = fn
}

func (p *Pipeline[E]) runCommitHook(m *store.Mark) error {
	if p.beforeCommit == nil {
		return nil
	}
	var cursor []byte
	var err error
	// A callback like Emit: a call back into the pipeline returns
	// ErrReentered.
	runCallback(&p.emitting, func() {
		cursor, err = p.beforeCommit(CommitPoint{Resume: m.Resume, NextSeq: m.Seen, Watermark: m.Watermark, Emitted: p.c.emitted})
	})
	if err != nil {
		p.err = err
		return err
	}
	if cursor != nil {
		m.Cursor = cursor
	}
	return nil
}
