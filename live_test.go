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

// SubmitBatch reports each event's own error and keeps the batch going
// past rejections.
func TestLiveSubmitBatch(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{})
	live := NewLive(p, &fakeClock{now: t0})
	batch := []login{{T: t0, Account: "a", Addr: "x"}, {T: 0, Account: "a"}, {T: t0 + 1, Account: "a", Addr: "x"}}
	errs, vals, err := live.SubmitBatch(context.Background(), batch, nil, []float64{})
	require.NoError(t, err)
	require.NoError(t, errs[0])
	require.ErrorIs(t, errs[1], ErrZeroTime)
	require.NoError(t, errs[2])
	require.Len(t, vals, 2*len(live.Names()))
	require.Equal(t, 2.0, vals[len(live.Names())+1], "addr.all_1m after two applied events")
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
