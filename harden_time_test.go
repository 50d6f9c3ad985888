package tallyward

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// One stray first event must not block a pipeline: a time of -1, seconds
// read as nanoseconds, MaxInt64 or the year 2200 is rejected as out of the
// plausible range, counted, and every later real event is applied.
func TestStrayFirstEventIsRejectedNotBlocking(t *testing.T) {
	year2200 := time.Date(2200, 1, 1, 0, 0, 0, 0, time.UTC)
	strays := map[string]int64{
		"minus one":       -1,
		"seconds":         t0 / int64(time.Second),
		"max int64":       math.MaxInt64,
		"year 2200":       year2200.UnixNano(),
		"year 1970 + 1ms": int64(time.Millisecond),
	}
	for name, stray := range strays {
		t.Run(name, func(t *testing.T) {
			for _, mode := range []Mode{Eager, Settled} {
				rows := newRowLog()
				p := openTest(t, loginSpec(rows.add), Options{Mode: mode, MaxDisorder: time.Second})
				err := p.Process(login{T: stray, Account: "a", Addr: "x"})
				require.ErrorIs(t, err, ErrOutOfRange)
				var re *RejectError
				require.True(t, errors.As(err, &re))
				require.Equal(t, OutOfRange, re.Reason)
				require.Contains(t, err.Error(), "limit")
				evs := genLogins(3, 500, 50, 20, 0)
				require.NoError(t, p.Replay(context.Background(), slice(evs)))
				s := p.Stats()
				require.Equal(t, uint64(1), s.Rejected[OutOfRange])
				require.Equal(t, uint64(len(evs)), s.Applied, "%v: every real event applied", mode)
				require.Zero(t, s.Late)
				require.Zero(t, s.Rejected[FutureTime])
				require.Len(t, rows.rows, len(evs))
			}
		})
	}
}

// Options bound the plausible range; Validate reports an inverted one.
func TestTimeRangeOptions(t *testing.T) {
	o := Options{EarliestTime: 10, LatestTime: 5}
	require.ErrorContains(t, o.Validate(), "EarliestTime")
	p := openTest(t, loginSpec(nil), Options{EarliestTime: math.MinInt64, LatestTime: math.MaxInt64})
	_, err := p.Score(login{T: -1, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err, "lifted bounds accept any non-zero time")
}

// Live mode checks the clock in both directions: a correct clock rejects
// an absurd past time (PastTime) and an absurd future one (FutureTime),
// so neither can become the newest time.
func TestLiveClockBothDirections(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{MaxDisorder: time.Second})
	clock := &fakeClock{now: t0}
	live := NewLive(p, clock)
	err := live.Submit(t.Context(), login{T: t0 - int64(90*24*time.Hour), Account: "a", Addr: "x"})
	require.ErrorIs(t, err, ErrPastTime)
	err = live.Submit(t.Context(), login{T: t0 + int64(3*time.Hour), Account: "a", Addr: "x"})
	require.ErrorIs(t, err, ErrFutureTime)
	var re *RejectError
	require.True(t, errors.As(err, &re))
	require.False(t, re.FromNewest, "the clock, not the newest time, was the limit")
	for i := range 10 {
		clock.now = t0 + int64(i)*int64(time.Second)
		require.NoError(t, live.Submit(t.Context(), login{T: clock.now, Account: "a", Addr: "x"}))
	}
	s := live.Stats()
	require.Equal(t, uint64(10), s.Applied)
	require.Equal(t, uint64(1), s.Rejected[PastTime])
	require.Equal(t, uint64(1), s.Rejected[FutureTime])

	// Negative PastSkew disables the past check.
	q := openTest(t, loginSpec(nil), Options{PastSkew: -1})
	require.NoError(t, NewLive(q, clock).Submit(t.Context(), login{T: t0 - int64(90*24*time.Hour), Account: "a", Addr: "x"}))
}

// A stray event inside the plausible range still moves the newest time:
// one far ahead makes every later event late, one far behind (first)
// makes every later event a FutureTime rejection whose error points at
// ResetNewest. ResetNewest is durable and lets real events through again.
func TestResetNewestUnblocks(t *testing.T) {
	hour := int64(time.Hour)
	evs := genLogins(5, 300, 30, 10, 0)
	t.Run("ahead", func(t *testing.T) {
		dir := t.TempDir()
		opts := Options{Dir: dir, MaxDisorder: time.Second}
		p := openTest(t, loginSpec(nil), opts)
		stray := t0 + 5*365*24*hour
		require.NoError(t, p.Process(login{T: stray, Account: "stray", Addr: "s"}))
		require.ErrorIs(t, p.Process(evs[0]), ErrLate)
		require.NoError(t, p.ResetNewest(evs[0].T-1))
		require.NoError(t, p.Close())

		p = openTest(t, loginSpec(nil), opts)
		require.Equal(t, evs[0].T-1, p.Stats().Newest, "the reset is durable")
		require.NoError(t, p.Feed(context.Background(), slice(evs)))
		s := p.Stats()
		require.Equal(t, uint64(1+len(evs)), s.Applied)
		require.Equal(t, uint64(1), s.Late, "only the event before the reset")
	})
	t.Run("behind", func(t *testing.T) {
		p := openTest(t, loginSpec(nil), Options{MaxDisorder: time.Second})
		require.NoError(t, p.Process(login{T: t0 - 5*365*24*hour, Account: "stray", Addr: "s"}))
		err := p.Process(evs[0])
		require.ErrorIs(t, err, ErrFutureTime)
		require.ErrorContains(t, err, "ResetNewest")
		require.NoError(t, p.ResetNewest(evs[0].T))
		require.NoError(t, p.Feed(context.Background(), slice(evs[1:])))
		require.Equal(t, uint64(len(evs)), p.Stats().Applied)
	})
	t.Run("refused", func(t *testing.T) {
		p := openTest(t, loginSpec(nil), Options{})
		require.ErrorIs(t, p.ResetNewest(-5), ErrOutOfRange)
		require.NoError(t, p.Flush())
		require.ErrorIs(t, p.ResetNewest(t0), ErrFlushed)
	})
}

// In Settled mode, events rejected while the watermark stands still used
// to add one entry each to the progress record rewritten at every commit.
// The record now stays small however many there are.
func TestProgressRecordStaysBounded(t *testing.T) {
	p := openTest(t, loginSpec(func(Row[login]) {}), Options{Mode: Settled, MaxDisorder: time.Minute, CommitEvery: -1})
	require.NoError(t, p.Process(login{T: t0, Account: "a", Addr: "x"})) // held: the resume point stays here
	for i := range 20_000 {
		err := p.Process(login{T: t0 + int64(2*time.Hour) + int64(i), Account: "a", Addr: "x"})
		require.ErrorIs(t, err, ErrFutureTime)
	}
	require.NoError(t, p.Commit(nil))
	require.Less(t, len(p.store.Mark().Extra), 200, "progress bytes")
}

// Re-reading after a restart judges future-time rejections exactly as the
// first time, from the newest time at the resume point rather than a
// list: rows and counters equal an uninterrupted run, over seeded streams
// and restart points.
func TestRestartRejudgesFutureEventsExactly(t *testing.T) {
	seeds, n := 4, 6_000
	if testing.Short() {
		seeds, n = 2, 3_000
	}
	for seed := range uint64(seeds) {
		r := rand.New(rand.NewPCG(seed, 77))
		evs := genLogins(9+seed, n, 300, 100, 2*time.Second)
		// Some events lie just beyond FutureSkew of the newest time. The
		// re-read stretch (MaxDisorder) is long enough for the newest
		// time to overtake them, so judging them by the final newest time
		// would accept them.
		for i := 100; i < len(evs); i += 2 + r.IntN(8) {
			evs[i].T += int64(62*time.Second) + r.Int64N(int64(8*time.Second))
		}
		opts := Options{Mode: Settled, MaxDisorder: 2 * time.Minute, FutureSkew: time.Minute, CommitEvery: -1}
		want := newRowLog()
		ref := openTest(t, richSpec(want.add), opts)
		require.NoError(t, ref.Replay(context.Background(), slice(evs)))
		require.Positive(t, ref.Stats().Rejected[FutureTime])

		opts.Dir = t.TempDir()
		got := newRowLog()
		p := openTest(t, richSpec(got.add), opts)
		for cut := 500 + r.IntN(1_000); cut < len(evs); cut += 500 + r.IntN(1_500) {
			require.NoError(t, p.Feed(context.Background(), Skip(slice(evs[:cut]), p.ResumeSeq())))
			require.NoError(t, p.Commit(nil))
			require.Less(t, p.ResumeSeq(), uint64(cut), "held events are re-read")
			require.NoError(t, p.Close())
			p = openTest(t, richSpec(got.add), opts)
		}
		require.NoError(t, p.Replay(context.Background(), Skip(slice(evs), p.ResumeSeq())))
		require.Equal(t, want.rows, got.rows, "seed %d", seed)
		rs, gs := ref.Stats(), p.Stats()
		require.Equal(t, rs.Rejected, gs.Rejected, "seed %d", seed)
		require.Equal(t, rs.Applied, gs.Applied, "seed %d", seed)
		require.Equal(t, rs.Late, gs.Late, "seed %d", seed)
	}
}

// An event the live clock rejected (and the newest time alone would have
// taken) is skipped when a restart re-reads it without that clock,
// rather than applied the second time round.
func TestRestartSkipsEventsTheClockRejected(t *testing.T) {
	minute := int64(time.Minute)
	evs := []login{
		{T: t0 + 50*minute, Account: "a", Addr: "x"},
		{T: t0 + 65*minute, Account: "a", Addr: "x"}, // beyond the clock + FutureSkew, within newest + FutureSkew
		{T: t0 + 51*minute, Account: "a", Addr: "x"},
	}
	dir := t.TempDir()
	rows := newRowLog()
	opts := Options{Dir: dir, Mode: Settled, MaxDisorder: 10 * time.Minute, CommitEvery: -1}
	p := openTest(t, loginSpec(rows.add), opts)
	live := NewLive(p, &fakeClock{now: t0})
	for i, e := range evs {
		err := live.Submit(t.Context(), e)
		if i == 1 {
			require.ErrorIs(t, err, ErrFutureTime)
		} else {
			require.NoError(t, err)
		}
	}
	require.NoError(t, live.Close())

	p = openTest(t, loginSpec(rows.add), opts)
	require.Zero(t, p.ResumeSeq(), "both accepted events are held and re-read")
	require.NoError(t, p.Replay(context.Background(), slice(evs)))
	s := p.Stats()
	require.Equal(t, uint64(2), s.Applied)
	require.Equal(t, uint64(1), s.Rejected[FutureTime])
	require.Len(t, rows.rows, 2)
	require.NotContains(t, rows.rows, uint64(1))
}

// A restart whose re-read stretch crosses a ResetNewest judges every
// event as the first run did: events that were late before the reset are
// not held again although the reset lowered the watermark below them.
func TestRestartAcrossResetNewestIsExact(t *testing.T) {
	evs := genLogins(29, 1_600, 200, 60, 2*time.Second)
	src := append(slices.Clone(evs[:1000]), login{ID: 99_999, T: evs[999].T + int64(6*time.Minute), Account: "stray", Addr: "s"})
	src = append(src, evs[1000:]...)
	for i := 1_300; i < 1_400; i += 10 {
		src[i].T = evs[1000].T + int64(time.Second) // late before the reset, above the watermark after it
	}
	const resetAt, commitAt = 1_401, 1_601
	resetTo := evs[1000].T
	opts := Options{Mode: Settled, MaxDisorder: 5 * time.Minute, CommitEvery: -1}

	want := newRowLog()
	ref := openTest(t, richSpec(want.add), opts)
	require.NoError(t, ref.Feed(context.Background(), slice(src[:resetAt])))
	require.NoError(t, ref.ResetNewest(resetTo))
	require.NoError(t, ref.Replay(context.Background(), slice(src[resetAt:])))
	require.Positive(t, ref.Stats().Late)

	opts.Dir = t.TempDir()
	got := newRowLog()
	p := openTest(t, richSpec(got.add), opts)
	require.NoError(t, p.Feed(context.Background(), slice(src[:resetAt])))
	require.NoError(t, p.ResetNewest(resetTo))
	require.NoError(t, p.Feed(context.Background(), slice(src[resetAt:commitAt])))
	require.NoError(t, p.Close())
	p = openTest(t, richSpec(got.add), opts)
	require.Less(t, p.ResumeSeq(), uint64(resetAt), "the re-read stretch crosses the reset")
	require.NoError(t, p.Replay(context.Background(), Skip(slice(src), p.ResumeSeq())))

	require.Equal(t, want.rows, got.rows)
	rs, gs := ref.Stats(), p.Stats()
	require.Equal(t, rs.Applied, gs.Applied)
	require.Equal(t, rs.Late, gs.Late)
}
