package tallyward

import (
	"bytes"
	"context"
	"errors"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// A live clock far behind the events makes every event "too far in the
// future". Run cannot return those rejections, so it must count and log
// them rather than end quietly as if all went well.
func TestLiveRunSurfacesRejections(t *testing.T) {
	var buf bytes.Buffer
	log := slog.New(slog.NewJSONHandler(&buf, nil))
	p := openTest(t, loginSpec(nil), Options{Logger: log})
	clock := &fakeClock{now: t0 - int64(24*time.Hour)} // a day behind
	live := NewLive(p, clock)
	ch := make(chan login, 100)
	for i := range 100 {
		ch <- login{T: t0 + int64(i), Account: "a", Addr: "x"}
	}
	close(ch)
	require.NoError(t, live.Run(context.Background(), ch, 0))
	st := live.Stats()
	require.Equal(t, uint64(100), st.Rejected[FutureTime])
	require.Zero(t, st.Applied)
	// Logged at the 1st, 2nd, 4th, ..., 64th rejection: 7 lines.
	var lines []string
	for _, l := range strings.Split(strings.TrimSpace(buf.String()), "\n") {
		if strings.Contains(l, "live: event rejected") {
			lines = append(lines, l)
		}
	}
	require.Len(t, lines, 7)
	require.Contains(t, lines[0], `"reason":"future-time"`)
	require.Contains(t, lines[0], `"clock":`)
	require.Contains(t, lines[6], `"rejected_so_far":64`)
}

// SubmitInOrder gives up waiting for earlier events when its context
// ends, submits nothing, and the sequence continues once the gap is
// filled.
func TestLiveSubmitInOrderHonoursContext(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{})
	live := NewLive(p, &fakeClock{now: t0})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- live.SubmitInOrder(ctx, 1, login{T: t0 + 1, Account: "a", Addr: "x"}) }()
	cancel()
	require.ErrorIs(t, <-done, context.Canceled)
	require.Zero(t, live.Stats().Events)

	bg := context.Background()
	go func() { done <- live.SubmitInOrder(bg, 1, login{T: t0 + 1, Account: "a", Addr: "x"}) }()
	require.NoError(t, live.SubmitInOrder(bg, 0, login{T: t0, Account: "a", Addr: "x"}))
	require.NoError(t, <-done)
	require.Equal(t, uint64(2), live.Stats().Applied)
}

// A context that has ended before the core is free changes nothing.
func TestLiveCanceledSubmitChangesNothing(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{})
	live := NewLive(p, &fakeClock{now: t0})
	live.sem <- struct{}{} // another caller holds the core
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, err := live.Score(ctx, login{T: t0, Account: "a", Addr: "x"}, nil)
	require.True(t, errors.Is(err, context.Canceled))
	live.unlock()
	require.Zero(t, live.Stats().Events)
}

// SubmitBatch takes a batch whole or not at all: one bad event refuses
// it before anything is consumed or counted.
func TestLiveSubmitBatchAllOrNothing(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{MaxDisorder: time.Second, CommitEvery: 2})
	live := NewLive(p, &fakeClock{now: t0})
	ctx := context.Background()
	ok := login{T: t0, Account: "a", Addr: "x"}
	for _, c := range []struct {
		bad  login
		want error
	}{
		{login{T: 0, Account: "a"}, ErrZeroTime},
		{login{T: t0 + int64(2*time.Hour), Account: "a"}, ErrFutureTime},
		// Late only once the batch's own first event has moved the
		// watermark: the check follows the batch as it would unfold.
		{login{T: t0 - int64(2*time.Second), Account: "a"}, ErrLate},
	} {
		_, _, err := live.SubmitBatch(ctx, []login{ok, ok, c.bad}, nil, false)
		var be *BatchError
		require.ErrorAs(t, err, &be)
		require.Equal(t, 2, be.Index)
		require.ErrorIs(t, err, c.want)
		st := live.Stats()
		require.Zero(t, st.Events)
		require.Zero(t, st.Rejected[ZeroTime]+st.Rejected[FutureTime]+st.Late)
		require.Zero(t, st.Commits)
	}
	batch := []login{ok, {T: t0 + 1, Account: "a", Addr: "x"}, {T: t0 + 2, Account: "b", Addr: "x"}}
	first, vals, err := live.SubmitBatch(ctx, batch, []float64{}, true)
	require.NoError(t, err)
	require.Zero(t, first)
	n := len(live.Names())
	require.Len(t, vals, 3*n)
	require.Equal(t, 3.0, vals[2*n+1], "addr.all_1m after three events")
	st := live.Stats()
	require.Equal(t, uint64(3), st.Applied)
	require.Equal(t, uint64(3), p.lastCommitSeen, "the automatic commit is cut after the batch, not inside it")
}

// Open's notices (a reset feature) and the storage engine's own messages
// reach Options.Logger.
func TestLoggerReceivesNotices(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir})
	require.NoError(t, err)
	_, err = p.Score(login{T: t0, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	require.NoError(t, p.Close())

	spec := loginSpec(nil)
	spec.Entities[0].Features[1].Kind = SlidingCount{Window: 2 * time.Minute, Resolution: time.Second}
	var buf bytes.Buffer
	p, err = Open(spec, Options{Dir: dir, ResetFeatures: []string{"addr.all_1m"}, Logger: slog.New(slog.NewTextHandler(&buf, nil))})
	require.NoError(t, err)
	require.NoError(t, p.Close())
	require.Contains(t, buf.String(), "addr.all_1m")
	require.Contains(t, buf.String(), "component=pebble")
}

// Erase, LiftErasure and Snapshot through Live while other goroutines
// submit (run under -race): each runs between two submissions, and the
// snapshot opens to a pipeline at a consistent cut.
func TestLiveMaintenanceDuringSubmissions(t *testing.T) {
	dir := t.TempDir()
	p := openTest(t, loginSpec(nil), Options{Dir: dir + "/state", MaxDisorder: time.Hour})
	live := NewLive(p, &fakeClock{now: t0})
	ctx := context.Background()
	done := make(chan struct{})
	go func() {
		defer close(done)
		for i := range 2000 {
			if err := live.Submit(ctx, login{T: t0 + int64(i), Account: "a", Addr: "x"}); err != nil {
				t.Error(err)
				return
			}
		}
	}()
	require.NoError(t, live.Erase(ctx, "account", "mallory"))
	require.NoError(t, live.Snapshot(ctx, dir+"/snap"))
	require.NoError(t, live.LiftErasure(ctx, "account", "mallory"))
	<-done
	vals, _, err := live.Lookup(ctx, "addr", "x", t0+2000, nil)
	require.NoError(t, err)
	require.Equal(t, 2000.0, vals[1], "addr.all_1m saw every event")

	q, err := Open(loginSpec(nil), Options{Dir: dir + "/snap", MaxDisorder: time.Hour, ItemKey: testItemKey})
	require.NoError(t, err)
	defer q.Close()
	n := q.ResumeSeq()
	got, _, err := q.Lookup("addr", "x", t0+2000, nil)
	require.NoError(t, err)
	require.Equal(t, float64(n), got[1], "the snapshot holds exactly the events before its resume point")
}
