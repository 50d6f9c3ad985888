package tallyward

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward/internal/sat"
)

// Lookups answer exactly what a row answers (same as-of rule, same
// aggregates), checked against the rows of the same run, and against a
// brute-force recount at random earlier times; they never change state:
// a run with lookups interleaved emits the same rows, bit for bit, as one
// without.
func TestLookupMatchesRowsAndChangesNothing(t *testing.T) {
	evs := genLogins(11, 20_000, 300, 500, 30*time.Second)
	opts := Options{MaxDisorder: 30 * time.Second, Lateness: ApplyLate}
	plain, looked := newRowLog(), newRowLog()
	p0 := openTest(t, richSpec(plain.add), opts)
	p1 := openTest(t, richSpec(looked.add), opts)
	names := p1.Names()
	first := 0
	for i, n := range names {
		if n == "account.logins_1h" {
			first = i
		}
	}
	r := rand.New(rand.NewPCG(3, 4))
	seen := map[string][]int64{}
	var row, got []float64
	for _, e := range evs {
		_, err := p0.Score(e, nil)
		require.NoError(t, err)
		row, err = p1.Score(e, row[:0])
		require.NoError(t, err)
		seen[e.Account] = append(seen[e.Account], e.T)

		got, exact, err := p1.Lookup("account", e.Account, e.T, got[:0])
		require.NoError(t, err)
		require.True(t, exact)
		for j, v := range got {
			name := names[first+j]
			switch name {
			case "account.prior_1h", "account.addr_freq":
				continue // BeforeEvent; the asking event's item
			}
			require.Equal(t, math.Float64bits(row[first+j]), math.Float64bits(v), "%s at event %d", name, e.ID)
		}

		// A random earlier time within the exact horizon of the newest
		// event: the hour count by brute force over the panes.
		q := p1.Watermark() - 1 + r.Int64N(int64(30*time.Second))
		got, exact, err = p1.Lookup("account", e.Account, q, got[:0])
		require.NoError(t, err)
		require.True(t, exact, "t >= watermark-1 is exact")
		want, res := 0, int64(time.Minute)
		for _, ti := range seen[e.Account] {
			if ti <= q && sat.FloorDiv(ti, res) > sat.FloorDiv(q, res)-60 {
				want++
			}
		}
		require.Equal(t, float64(want), got[0], "brute-force hour count of %s at %d", e.Account, q)
	}
	require.Equal(t, plain.rows, looked.rows)
	require.Equal(t, p0.Stats().CacheMisses, p1.Stats().CacheMisses)
}

func TestLookupUnknownErasedExpired(t *testing.T) {
	min := int64(time.Minute)
	p := openTest(t, richSpec(nil), Options{})
	fresh, exact, err := p.Lookup("account", "nobody", t0, nil)
	require.NoError(t, err)
	require.True(t, exact)
	require.Equal(t, float64(0), fresh[0])

	for i := range 5 {
		_, err := p.Score(login{T: t0 + int64(i)*min, Account: "a", Addr: "x"}, nil)
		require.NoError(t, err)
	}
	got, _, err := p.Lookup("account", "a", t0+5*min, nil)
	require.NoError(t, err)
	require.Equal(t, 5.0, got[0])

	require.NoError(t, p.Erase("account", "a"))
	live := p.Stats().LiveEntities
	got, exact, err = p.Lookup("account", "a", t0+5*min, nil)
	require.NoError(t, err)
	require.True(t, exact)
	requireSameBits(t, fresh, got)
	// The lookup did not bring the key back: events still skip it.
	require.Equal(t, live, p.Stats().LiveEntities)
	_, err = p.Score(login{T: t0 + 6*min, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	got, _, err = p.Lookup("account", "a", t0+6*min, nil)
	require.NoError(t, err)
	requireSameBits(t, fresh, got)
	require.Equal(t, uint64(1), p.Stats().ErasedSkips)

	// An expired record answers like a new one before any sweep.
	q := openTest(t, loginSpec(nil), Options{TTL: time.Hour})
	_, err = q.Score(login{T: t0, Account: "b", Addr: "x"}, nil)
	require.NoError(t, err)
	for _, m := range []int64{50, 100} {
		_, err = q.Score(login{T: t0 + m*min, Account: "c", Addr: "x"}, nil)
		require.NoError(t, err)
	}
	got, _, err = q.Lookup("account", "b", t0, nil)
	require.NoError(t, err)
	require.Equal(t, 0.0, got[0])

	_, _, err = p.Lookup("nosuch", "a", t0, nil)
	require.ErrorIs(t, err, ErrUnknownEntity)
	_, _, err = p.Lookup("account", "", t0, nil)
	require.ErrorIs(t, err, ErrEmptyKey)
}

func requireSameBits(t *testing.T, want, got []float64) {
	t.Helper()
	require.Equal(t, len(want), len(got))
	for i := range want {
		require.Equal(t, math.Float64bits(want[i]), math.Float64bits(got[i]), "value %d", i)
	}
}

// Below the exact horizon the answer is flagged. With MaxDisorder 0 the
// horizon is 1 ns behind the key's newest event.
func TestLookupFlagsDegradedAnswers(t *testing.T) {
	min := int64(time.Minute)
	p := openTest(t, loginSpec(nil), Options{})
	for i := range 120 {
		_, err := p.Score(login{T: t0 + int64(i)*min, Account: "a", Addr: "x"}, nil)
		require.NoError(t, err)
	}
	newest := t0 + 119*min
	_, exact, err := p.Lookup("account", "a", newest-1, nil)
	require.NoError(t, err)
	require.True(t, exact)
	got, exact, err := p.Lookup("account", "a", newest-2, nil)
	require.NoError(t, err)
	require.False(t, exact)
	// The degraded rule of package window: only panes wholly before the
	// asked one count, so the count is at most the exact one.
	require.LessOrEqual(t, got[0], 60.0)
	_, exact, err = p.Lookup("account", "a", newest+int64(time.Hour), nil)
	require.NoError(t, err)
	require.True(t, exact, "a later time is exact")
}

func TestLookupAllocatesNothingOnHit(t *testing.T) {
	if raceEnabled {
		t.Skip("the race detector's instrumentation allocates")
	}
	p := openTest(t, richSpec(nil), Options{})
	for _, e := range genLogins(5, 2000, 50, 50, 0) {
		_, err := p.Score(e, nil)
		require.NoError(t, err)
	}
	dst := make([]float64, 0, 32)
	tq := p.Watermark()
	allocs := testing.AllocsPerRun(1000, func() {
		var err error
		dst, _, err = p.Lookup("account", "acct-1", tq, dst[:0])
		if err != nil {
			t.Fatal(err)
		}
	})
	require.Zero(t, allocs)
}

// Live.Lookup is safe beside concurrent submissions (run with -race).
// Other goroutines submit newer events between a submission and its
// lookup, so the lookup asks behind the newest event: MaxDisorder covers
// the whole stream (about 15 minutes) to keep every answer exact.
func TestLiveLookupConcurrent(t *testing.T) {
	evs := genLogins(8, 4000, 40, 40, 0)
	p := openTest(t, loginSpec(nil), Options{MaxDisorder: time.Hour})
	l := NewLive(p, &fakeClock{now: t0 + int64(24*time.Hour)})
	var wg sync.WaitGroup
	fails := make([]string, 4)
	for g := range 4 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var dst []float64
			for i := g; i < len(evs); i += 4 {
				err := l.SubmitInOrder(context.Background(), uint64(i), evs[i])
				exact := true
				if err == nil {
					dst, exact, err = l.Lookup(context.Background(), "account", evs[i].Account, evs[i].T, dst[:0])
				}
				if err == nil && !exact {
					err = fmt.Errorf("answer not exact")
				}
				if err == nil && dst[0] < 1 {
					err = fmt.Errorf("count %v < 1", dst[0])
				}
				if err != nil && fails[g] == "" {
					fails[g] = fmt.Sprintf("event %d: %v", i, err)
				}
			}
		}()
	}
	wg.Wait()
	require.Equal(t, make([]string, 4), fails)
}

// Lookup costs against a same-run baseline, Score of an event of the same
// key (read the ratios, not the absolute figures):
//
//	go test -run '^$' -bench Lookup -benchmem .
func BenchmarkLookup(b *testing.B) {
	const keys = 50_000
	evs := make([]login, keys)
	for i := range evs {
		evs[i] = login{T: t0 + int64(i)*int64(time.Millisecond), Account: fmt.Sprintf("acct-%d", i), Addr: "x"}
	}
	setup := func(b *testing.B, cache int64) *Pipeline[login] {
		p, err := Open(loginSpec(nil), Options{CacheBytes: cache, CommitEvery: -1})
		require.NoError(b, err)
		b.Cleanup(func() { p.Close() })
		for _, e := range evs {
			_, err := p.Score(e, nil)
			require.NoError(b, err)
		}
		require.NoError(b, p.Commit(nil))
		return p
	}
	tq := evs[keys-1].T
	b.Run("baseline-score-hit", func(b *testing.B) {
		p := setup(b, 0)
		dst := make([]float64, 0, 8)
		tt := tq
		b.ReportAllocs()
		b.ResetTimer()
		for i := range b.N {
			tt++
			dst, _ = p.Score(login{T: tt, Account: evs[i%1000].Account, Addr: "x"}, dst[:0])
		}
	})
	b.Run("hit", func(b *testing.B) {
		p := setup(b, 0)
		dst := make([]float64, 0, 8)
		b.ReportAllocs()
		b.ResetTimer()
		for i := range b.N {
			dst, _, _ = p.Lookup("account", evs[i%1000].Account, tq, dst[:0])
		}
	})
	b.Run("miss-unknown", func(b *testing.B) {
		p := setup(b, 0)
		dst := make([]float64, 0, 8)
		b.ReportAllocs()
		b.ResetTimer()
		for range b.N {
			dst, _, _ = p.Lookup("account", "nobody", tq, dst[:0])
		}
	})
	b.Run("miss-stored", func(b *testing.B) {
		// A cache far smaller than the key set: almost every lookup of a
		// random stored key reads Pebble and decodes the record.
		p := setup(b, 256<<10)
		dst := make([]float64, 0, 8)
		r := rand.New(rand.NewPCG(1, 2))
		b.ReportAllocs()
		b.ResetTimer()
		for range b.N {
			dst, _, _ = p.Lookup("account", evs[r.IntN(keys)].Account, tq, dst[:0])
		}
	})
}
