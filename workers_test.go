package tallyward

import (
	"crypto/sha256"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// The sharded pipeline's invariant: with any number of workers, rows (their
// values, their order) and stored state are bit-identical to one worker's.
// The reference is the one-worker pipeline, itself pinned by brute force
// (asof_test.go) and by recorded digests (TestRowsMatchGolden).

// TestWorkersMatchGolden replays the golden stream with 2 and 3 workers
// and compares the digests of rows in emission order with the ones the
// one-worker pipeline recorded.
func TestWorkersMatchGolden(t *testing.T) {
	evs := genLogins(7, 20_000, 2_000, 500, 30*time.Second)
	want, err := os.ReadFile(filepath.Join("testdata", "rows_golden.txt"))
	require.NoError(t, err)
	for _, workers := range []int{2, 3} {
		var got strings.Builder
		for _, mode := range []Mode{Eager, Settled} {
			log := newRowLog()
			p := openTest(t, richSpec(log.add), Options{Mode: mode, MaxDisorder: 30 * time.Second, Lateness: ApplyLate, UnkeyedItems: true, Workers: workers})
			require.NoError(t, p.Replay(t.Context(), slice(evs)))
			h := sha256.New()
			for _, seq := range log.order {
				fmt.Fprintf(h, "%d %s\n", seq, log.rows[seq])
			}
			fmt.Fprintf(&got, "%v rows=%d sha256=%x\n", mode, len(log.order), h.Sum(nil))
		}
		require.Equal(t, string(want), got.String(), "workers=%d", workers)
	}
}

// callbackLog records every callback in order, so interleaving of rows,
// watermarks and diverted late events can be compared.
type callbackLog struct {
	rows *rowLog
	seq  []string
}

func (c *callbackLog) spec() Spec[login] {
	s := richSpec(func(r Row[login]) {
		c.rows.add(r)
		c.seq = append(c.seq, fmt.Sprintf("row %d %s", r.Seq, c.rows.rows[r.Seq]))
	})
	s.OnWatermark = func(w int64) { c.seq = append(c.seq, fmt.Sprintf("wm %d", w)) }
	s.OnLate = func(e login) { c.seq = append(c.seq, fmt.Sprintf("late %d", e.ID)) }
	return s
}

// runWorkers feeds evs to a fresh pipeline with the given workers, a
// small cache (so parts evict and read back) and frequent commits, and
// returns its callbacks in order and its stored records.
func runWorkers(t *testing.T, evs []login, opts Options, workers int, score bool) ([]string, []string) {
	t.Helper()
	c := &callbackLog{rows: newRowLog()}
	opts.Workers = workers
	opts.Dir = t.TempDir()
	p := openTest(t, c.spec(), opts)
	var vals []float64
	for i, e := range evs {
		var err error
		if score && opts.Mode == Eager && i%7 == 0 {
			vals, err = p.Score(e, vals[:0])
			if err == nil {
				c.seq = append(c.seq, fmt.Sprintf("score %d %x", i, vals))
			}
		} else {
			err = p.Process(e)
		}
		if err != nil && !benign(err) {
			t.Fatal(err)
		}
		if i%5000 == 4999 {
			// A read between events must see every event before it.
			got, exact, err := p.Lookup("account", e.Account, e.T, nil)
			require.NoError(t, err)
			c.seq = append(c.seq, fmt.Sprintf("lookup %s %v %x", e.Account, exact, got))
		}
	}
	require.NoError(t, p.Flush())
	require.NoError(t, p.Commit(nil))
	recs := dumpRecords(t, p.store.DB())
	st := p.Stats()
	c.seq = append(c.seq, fmt.Sprintf("stats applied=%d emitted=%d late=%d live=%d tooOld=%d", st.Applied, st.Emitted, st.Late, st.LiveEntities, st.TooOld))
	return c.seq, recs
}

// TestWorkersMatchOneWorker compares, callback for callback and record for
// record, 1 worker against 2 and 4 on shuffled streams in both modes and
// under every lateness policy, with Score and Lookup interleaved, a cache
// small enough to evict, and commits every 3000 events.
func TestWorkersMatchOneWorker(t *testing.T) {
	n := 30_000
	if testing.Short() {
		n = 12_000
	}
	for _, mode := range []Mode{Eager, Settled} {
		for _, late := range []Lateness{ApplyLate, DropLate, DivertLate} {
			t.Run(fmt.Sprintf("%v/%v", mode, late), func(t *testing.T) {
				r := rand.New(rand.NewPCG(uint64(mode), uint64(late)))
				evs := shuffleWithin(r, genLogins(uint64(11+late), n, 3_000, 800, 0), 90*time.Second)
				opts := Options{Mode: mode, MaxDisorder: 30 * time.Second, Lateness: late, CacheBytes: 1 << 20, CommitEvery: 3000}
				wantSeq, wantRecs := runWorkers(t, evs, opts, 1, true)
				for _, w := range []int{2, 4} {
					gotSeq, gotRecs := runWorkers(t, evs, opts, w, true)
					require.Equal(t, len(wantSeq), len(gotSeq), "workers=%d: callbacks", w)
					for i := range wantSeq {
						if wantSeq[i] != gotSeq[i] {
							t.Fatalf("workers=%d: callback %d differs:\n one: %s\nmany: %s", w, i, wantSeq[i], gotSeq[i])
						}
					}
					require.Equal(t, wantRecs, gotRecs, "workers=%d: stored records", w)
				}
			})
		}
	}
}

// stopWorkersForCrash stops a pipeline's workers as a crash would: the
// batch in flight is not delivered, nothing is committed.
func stopWorkersForCrash[E any](p *Pipeline[E]) {
	if p.work == nil {
		return
	}
	p.joinWork()
	p.stopWorkers()
}

// TestLiveScoreGroupedMatchesOneWorker: Score from several goroutines on a
// Live over two workers (calls waiting for the core run as one batch),
// and SubmitBatch with values, against the one-worker pipeline fed the
// same sequence: each call's values equal its row, and every row equals
// the one-worker row of the same event.
func TestLiveScoreGroupedMatchesOneWorker(t *testing.T) {
	for _, group := range []int{1, groupForWorkers} {
		t.Run(fmt.Sprintf("group=%d", group), func(t *testing.T) {
			// group 1: every queued call goes to the workers; the default:
			// a few queued calls run on the goroutine holding the core.
			defer func(g int) { groupForWorkers = g }(groupForWorkers)
			groupForWorkers = group
			testLiveScoreGrouped(t)
		})
	}
}

func testLiveScoreGrouped(t *testing.T) {
	n := 20_000
	if testing.Short() {
		n = 6_000
	}
	evs := genLogins(3, n, 2_000, 700, 0)
	var mu sync.Mutex
	rows := newRowLog()
	var order []login
	// Goroutines race for the core, so events arrive out of time order;
	// a wide MaxDisorder keeps every one of them on time.
	opts := Options{MaxDisorder: time.Hour, CommitEvery: 1500, CacheBytes: 1 << 20, Workers: 2, Dir: t.TempDir()}
	p := openTest(t, richSpec(func(r Row[login]) {
		mu.Lock()
		rows.add(r)
		order = append(order, r.Event)
		mu.Unlock()
	}), opts)
	live := NewLive(p, &fakeClock{now: t0 + int64(24*time.Hour)})
	scored := make([][]float64, len(evs))
	const goroutines = 4
	var wg sync.WaitGroup
	for g := range goroutines {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var vals []float64
			for i := g; i < len(evs); i += goroutines {
				var err error
				vals, err = live.Score(t.Context(), evs[i], vals[:0])
				if err != nil && !benign(err) {
					t.Error(err)
					return
				}
				if err == nil {
					scored[i] = slices.Clone(vals)
				}
			}
		}()
	}
	wg.Wait()
	// A batch with values after the concurrent part.
	tail := genLogins(4, 500, 200, 50, 0)
	shift := evs[len(evs)-1].T - tail[0].T + 1
	for i := range tail {
		tail[i].T += shift
		tail[i].ID += uint64(len(evs))
	}
	_, batchVals, err := live.SubmitBatch(t.Context(), tail, nil, true)
	require.NoError(t, err)
	require.NoError(t, live.Commit(t.Context(), nil))
	require.NoError(t, live.Close())

	require.Equal(t, len(evs)+len(tail), len(order), "rows")
	ref := newRowLog()
	rp := openTest(t, richSpec(ref.add), Options{MaxDisorder: time.Hour})
	require.NoError(t, rp.Replay(t.Context(), slice(order)))
	require.Equal(t, ref.rows, rows.rows, "rows of two workers and grouped Score vs one worker")
	nf := len(rp.Names())
	for seq, e := range order {
		want := ref.rows[uint64(seq)]
		if e.ID < uint64(len(evs)) {
			require.Equal(t, want, rowText(ref, uint64(seq), scored[e.ID]), "event %d", e.ID)
		} else {
			k := int(e.ID) - len(evs)
			require.Equal(t, want, rowText(ref, uint64(seq), batchVals[k*nf:(k+1)*nf]), "batch event %d", k)
		}
	}
}

// rowText renders vals as rowLog renders the row of seq in ref.
func rowText(ref *rowLog, seq uint64, vals []float64) string {
	var b strings.Builder
	row := ref.rows[seq]
	b.WriteString(row[:strings.Index(row, " late=")+len(" late=false")])
	for _, v := range vals {
		fmt.Fprintf(&b, " %x", math.Float64bits(v))
	}
	return b.String()
}

// TestLiveRunDeliversWithWorkers: rows of events submitted through Run
// reach Emit without a commit or a flush once the channel runs dry, and
// equal the one-worker rows.
func TestLiveRunDeliversWithWorkers(t *testing.T) {
	evs := genLogins(9, 3_000, 300, 100, 0)
	run := func(workers int) *rowLog {
		rows := newRowLog()
		var mu sync.Mutex
		p := openTest(t, richSpec(func(r Row[login]) { mu.Lock(); rows.add(r); mu.Unlock() }), Options{Workers: workers})
		live := NewLive(p, &fakeClock{now: t0 + int64(24*time.Hour)})
		ch := make(chan login, 64)
		go func() {
			for _, e := range evs {
				ch <- e
			}
			close(ch)
		}()
		require.NoError(t, live.Run(t.Context(), ch, 0))
		mu.Lock()
		defer mu.Unlock()
		return rows
	}
	one, two := run(1), run(2)
	require.Len(t, two.rows, len(evs))
	require.Equal(t, one.rows, two.rows)
	require.Equal(t, one.order, two.order)
}
