package tallyward

import (
	"fmt"
	"math"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// Live's Erase, LiftErasure and Snapshot run between submissions from
// other goroutines (the race detector checks the locking: go test -race
// -run Live), and every snapshot taken meanwhile opens.
func TestLiveEraseAndSnapshotWhileSubmitting(t *testing.T) {
	evs := genLogins(21, 8_000, 300, 100, 0)
	p := openTest(t, loginSpec(nil), Options{Dir: t.TempDir(), CommitEvery: 1_000})
	clock := &fakeClock{now: t0 + int64(24*time.Hour)}
	live := NewLive(p, clock)
	const workers = 4
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := w; i < len(evs); i += workers {
				if err := live.SubmitInOrder(t.Context(), uint64(i), evs[i]); err != nil && !benign(err) {
					t.Error(err)
					return
				}
			}
		}()
	}
	snaps := t.TempDir()
	for i := range 6 {
		acct := fmt.Sprintf("acct-%d", i+1)
		require.NoError(t, live.Erase(t.Context(), "account", acct))
		require.NoError(t, live.Snapshot(t.Context(), fmt.Sprintf("%s/%d", snaps, i)))
		_ = live.Stats()
		if i%2 == 0 {
			require.NoError(t, live.LiftErasure(t.Context(), "account", acct))
		}
	}
	wg.Wait()
	require.NoError(t, live.Commit(t.Context(), nil))
	s := live.Stats()
	require.Equal(t, uint64(len(evs)), s.Events)
	require.Positive(t, s.Erased+s.ErasedSkips)
	require.NoError(t, live.Close())
	require.ErrorIs(t, live.Erase(t.Context(), "account", "x"), ErrClosed)

	// Each snapshot opens as a consistent store.
	q, err := Open(loginSpec(nil), Options{Dir: snaps + "/5", ItemKey: testItemKey})
	require.NoError(t, err)
	require.NoError(t, q.Close())
}

// Calling back into the pipeline from Spec.Emit is refused with
// ErrReentered: the outer Score still returns its own event's features
// and nothing else changes.
func TestEmitReentryIsRefused(t *testing.T) {
	evs := genLogins(23, 50, 5, 3, 0)
	want := openTest(t, loginSpec(nil), Options{})
	var p *Pipeline[login]
	var inner []error
	spec := loginSpec(func(r Row[login]) {
		_, err := p.Score(login{T: r.Time + 1, Account: "other", Addr: "y"}, nil)
		inner = append(inner, err, p.Process(r.Event), p.Commit(nil), p.Flush(), p.Erase("account", "a"), p.ResetNewest(r.Time), p.Close())
		_ = p.Stats() // reading is fine
	})
	p = openTest(t, spec, Options{})
	for _, e := range evs {
		got, err := p.Score(e, nil)
		require.NoError(t, err)
		exp, err := want.Score(e, nil)
		require.NoError(t, err)
		require.Equal(t, exp, got)
	}
	require.Len(t, inner, 7*len(evs))
	for _, err := range inner {
		require.ErrorIs(t, err, ErrReentered)
	}
	require.Equal(t, want.Stats().Applied, p.Stats().Applied)

	// So are the spec's functions: a Key that processes another event.
	var r *Pipeline[login]
	var keyErr error
	keySpec := loginSpec(nil)
	keySpec.Entities[0].Key = func(e login) string {
		if e.Addr == "x" {
			keyErr = r.Process(login{T: e.T, Account: "inner", Addr: "y"})
		}
		return e.Addr
	}
	r = openTest(t, keySpec, Options{})
	got, err := r.Score(login{T: t0, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	require.ErrorIs(t, keyErr, ErrReentered)
	clean, err := openTest(t, loginSpec(nil), Options{}).Score(login{T: t0, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	require.Equal(t, clean, got)
	require.Equal(t, uint64(1), r.Stats().Events)

	// OnLate is a callback too.
	var q *Pipeline[login]
	lateSpec := loginSpec(nil)
	var lateErr error
	lateSpec.OnLate = func(e login) { lateErr = q.Process(e) }
	q = openTest(t, lateSpec, Options{Lateness: DivertLate})
	require.NoError(t, q.Process(login{T: t0 + 10, Account: "a", Addr: "x"}))
	require.ErrorIs(t, q.Process(login{T: t0, Account: "a", Addr: "x"}), ErrLate)
	require.ErrorIs(t, lateErr, ErrReentered)
}

// Live.Submit from inside Emit used to deadlock (the lock is held around
// Emit). It returns ErrReentered; Live.Stats works there; another
// goroutine submitting meanwhile just waits its turn.
func TestLiveEmitReentryDoesNotDeadlock(t *testing.T) {
	var live *Live[login]
	var errs []error
	var stats []Stats
	p := openTest(t, loginSpec(func(r Row[login]) {
		errs = append(errs, live.Submit(t.Context(), login{T: r.Time, Account: "b", Addr: "z"}), live.SubmitInOrder(t.Context(), r.Seq+1, r.Event),
			live.Commit(t.Context(), nil), live.Erase(t.Context(), "account", "a"), live.Snapshot(t.Context(), "never"), live.Tick(t.Context()), live.Flush(t.Context()))
		_, err := live.Score(t.Context(), r.Event, nil)
		errs = append(errs, err)
		stats = append(stats, live.Stats())
	}), Options{IdleAdvance: time.Second, MaxDisorder: time.Hour})
	live = NewLive(p, &fakeClock{now: t0})
	done := make(chan error, 1)
	go func() {
		var err error
		for i := range 20 {
			if e := live.Submit(t.Context(), login{T: t0 + int64(i), Account: "a", Addr: "x"}); e != nil {
				err = e
			}
		}
		done <- err
	}()
	for i := range 20 {
		require.NoError(t, live.Submit(t.Context(), login{T: t0 + int64(i), Account: "c", Addr: "w"}))
	}
	select {
	case err := <-done:
		require.NoError(t, err)
	case <-time.After(time.Minute): // a guard against a hang, not a timing assertion
		t.Fatal("deadlock")
	}
	require.Len(t, errs, 8*40)
	for _, err := range errs {
		require.ErrorIs(t, err, ErrReentered)
	}
	require.Len(t, stats, 40)
	require.Equal(t, uint64(40), live.Stats().Applied)
}

// A goroutine waiting in SubmitInOrder for a turn that never comes is
// woken by Close with ErrClosed.
func TestSubmitInOrderWokenByClose(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{})
	live := NewLive(p, &fakeClock{now: t0})
	done := make(chan error, 1)
	go func() { done <- live.SubmitInOrder(t.Context(), 5, login{T: t0, Account: "a", Addr: "x"}) }()
	require.NoError(t, live.Submit(t.Context(), login{T: t0, Account: "a", Addr: "x"}))
	require.ErrorContains(t, live.SubmitInOrder(t.Context(), 0, login{T: t0, Account: "a", Addr: "x"}), "already submitted")
	require.NoError(t, live.Close())
	select {
	case err := <-done:
		require.ErrorIs(t, err, ErrClosed)
	case <-time.After(time.Minute): // a guard against a hang, not a timing assertion
		t.Fatal("SubmitInOrder still parked after Close")
	}
}

// Every value kind refuses the same values: NaN, ±Inf and beyond ±1e30
// (Decayed used to refuse values above 1e30 silently, counted as too
// old, while SlidingSum took them), so two MaxFloat64 values can no
// longer turn a sliding sum into +Inf.
func TestValueBoundIsTheSameForEveryKind(t *testing.T) {
	amount := func(e login) float64 { return e.Amount }
	spec := Spec[login]{Time: func(e login) int64 { return e.T }, Entities: []Entity[login]{
		{Name: "account", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
			{Name: "sum", Kind: SlidingSum{Window: time.Hour}, Value: amount},
			{Name: "max", Kind: SlidingMax{Window: time.Hour}, Value: amount},
			{Name: "mean", Kind: SlidingMean{Window: time.Hour}, Value: amount},
			{Name: "dsum", Kind: Decayed{HalfLife: time.Hour, Stat: DecayedSum}, Value: amount},
			{Name: "dvar", Kind: Decayed{HalfLife: time.Hour, Stat: DecayedVariance}, Value: amount},
			{Name: "p50", Kind: Quantile{Q: 0.5}, Value: amount},
		}},
	}}
	p := openTest(t, spec, Options{})
	for i, v := range []float64{math.MaxFloat64, math.MaxFloat64, -2 * MaxValue, math.Nextafter(MaxValue, math.Inf(1))} {
		_, err := p.Score(login{T: t0 + int64(i), Account: "a", Amount: v}, nil)
		require.ErrorIs(t, err, ErrBadValue, "%g", v)
	}
	got, err := p.Score(login{T: t0 + 10, Account: "a", Amount: MaxValue}, nil)
	require.NoError(t, err)
	got, err = p.Score(login{T: t0 + 11, Account: "a", Amount: MaxValue}, nil)
	require.NoError(t, err)
	require.Equal(t, 2*MaxValue, got[0])
	require.InEpsilon(t, 2*MaxValue, got[3], 1e-9)
	for _, v := range got {
		require.False(t, math.IsInf(v, 0))
	}
	s := p.Stats()
	require.Equal(t, uint64(4), s.Rejected[BadValue])
	require.Zero(t, s.TooOld)
}

// SinceLast asks for the newest event strictly before t; at MinInt64
// there is none, and t-1 used to wrap to MaxInt64 and answer 0.
// BeforeEvent features used to wrap the same way.
func TestSinceLastAtMinInt64(t *testing.T) {
	spec := Spec[login]{Time: func(e login) int64 { return e.T }, Entities: []Entity[login]{
		{Name: "account", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
			{Name: "since", Kind: Recency{}},
			{Name: "count_before", Kind: SlidingCount{Window: time.Hour}, BeforeEvent: true},
		}},
	}}
	p := openTest(t, spec, Options{EarliestTime: math.MinInt64, Lateness: ApplyLate, MaxDisorder: time.Hour})
	got, err := p.Score(login{T: math.MinInt64, Account: "a"}, nil)
	require.NoError(t, err)
	require.True(t, math.IsNaN(got[0]), "since-last %v", got[0])
	require.Zero(t, got[1])
	got, err = p.Score(login{T: math.MinInt64, Account: "a"}, nil)
	require.NoError(t, err)
	require.True(t, math.IsNaN(got[0]), "since-last %v", got[0])
	require.Zero(t, got[1], "nothing is before MinInt64")
}

// SlidingCount{Window: MaxInt64, Resolution: 1} passes Validate; it used
// to panic in Open (a pane count overflowed).
func TestHugeWindowOpensAndAnswers(t *testing.T) {
	k := SlidingCount{Window: math.MaxInt64, Resolution: 1}
	require.NoError(t, k.Validate())
	spec := Spec[login]{Time: func(e login) int64 { return e.T }, Entities: []Entity[login]{
		{Name: "account", Key: func(e login) string { return e.Account }, Features: []Feature[login]{{Name: "all", Kind: k}}},
	}}
	p := openTest(t, spec, Options{})
	for i := range 5 {
		got, err := p.Score(login{T: t0 + int64(i)*int64(time.Hour), Account: "a"}, nil)
		require.NoError(t, err)
		require.Equal(t, float64(i+1), got[0])
	}
}

// Distinct's pane limit (window plus allowed disorder) is stated at the
// root and named by Open's error; its exact-set size is settable.
func TestDistinctLimitsAreStatedAndSettable(t *testing.T) {
	k := Distinct{Window: time.Hour, Resolution: time.Minute}
	require.NoError(t, k.Validate())
	spec := Spec[login]{Time: func(e login) int64 { return e.T }, Emit: func(Row[login]) {}, Entities: []Entity[login]{
		{Name: "addr", Key: func(e login) string { return e.Addr }, Features: []Feature[login]{{Name: "accts", Kind: k, Item: func(e login) string { return e.Account }}}},
	}}
	_, err := Open(spec, Options{Mode: Settled, MaxDisorder: 10 * time.Hour})
	require.ErrorContains(t, err, "addr.accts")
	require.ErrorContains(t, err, "MaxDisorder")
	require.ErrorContains(t, err, "512")

	require.Equal(t, k.Describe(), Distinct{Window: time.Hour, Resolution: time.Minute, ExactLimit: 128}.Describe(), "the default keeps old definitions")
	small := Distinct{Window: time.Hour, Resolution: time.Minute, ExactLimit: 4}
	require.Contains(t, small.Describe(), "exact-limit=4")
	require.Error(t, Distinct{Window: time.Hour, ExactLimit: 5000}.Validate())
	spec.Entities[0].Features[0].Kind = small
	rows := map[int]float64{}
	spec.Emit = func(r Row[login]) { rows[int(r.Seq)] = r.Values[0] }
	p := openTest(t, spec, Options{})
	for i := range 10 {
		require.NoError(t, p.Process(login{T: t0 + int64(i), Addr: "x", Account: fmt.Sprint(i)}))
	}
	for i := range 10 {
		// HyperLogLog at p=12 is far closer than this for ten items
		// (relative standard error 1.04/√4096 ≈ 1.6%).
		require.InDelta(t, float64(i+1), rows[i], 1)
	}
}
