package tallyward

import (
	"math/rand/v2"
	"strconv"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// Invariant 6 (DESIGN.md): with a TTL, the number of live records tracks
// the active entity set, not the history. Five million distinct entities
// each appear for under half an hour across 90 simulated days; at every
// commit the live count must be within 10% of the true active set (entities
// whose newest event is within the TTL of the expiry clock, counted here
// independently), and the store's size must stay bounded.
func TestChurnKeepsStateBounded(t *testing.T) {
	if testing.Short() {
		t.Skip("five million entities")
	}
	const (
		entities = 5_000_000
		ttl      = 2 * time.Hour
		disorder = 30 * time.Minute
	)
	span := int64(90 * 24 * time.Hour)
	gap := span / entities
	spec := Spec[login]{
		Time: func(e login) int64 { return e.T },
		Entities: []Entity[login]{{Name: "device", Key: func(e login) string { return e.Account }, Features: []Feature[login]{
			{Name: "n_1h", Kind: SlidingCount{Window: time.Hour, Resolution: time.Minute}},
		}}},
	}
	p := openTest(t, spec, Options{TTL: ttl, MaxDisorder: disorder, Dir: t.TempDir(), CommitEvery: -1, CacheBytes: 32 << 20})

	// Independent bookkeeping of each entity's newest time, bucketed by
	// minute, to count the true active set.
	const bucket = int64(time.Minute)
	lastOf := map[int]int64{}
	perMinute := map[int64]int{}
	r := rand.New(rand.NewPCG(61, 61))
	var maxDisk, events uint64
	commits := 0
	var worst float64
	commit := func() {
		require.NoError(t, p.Commit(nil))
		commits++
		clock := p.expiryClock()
		active := 0
		for m, n := range perMinute {
			if (m+1)*bucket-1+int64(ttl) > clock { // some time in the minute is still active
				active += n
			}
		}
		s := p.Stats()
		if active > 1000 {
			dev := float64(s.LiveEntities-int64(active)) / float64(active)
			worst = max(worst, dev, -dev)
			require.InDelta(t, 0, dev, 0.10, "commit %d: live %d, active %d", commits, s.LiveEntities, active)
		}
		maxDisk = max(maxDisk, s.DiskBytes)
		// Forget bookkeeping of entities long gone.
		for m := range perMinute {
			if (m+1)*bucket+int64(ttl)+int64(time.Hour) < clock {
				delete(perMinute, m)
			}
		}
	}
	type pend struct {
		t  int64
		id int
	}
	var buf []pend
	for id := range entities {
		start := t0 + int64(id)*gap
		for range 1 + r.IntN(2) {
			buf = append(buf, pend{start + r.Int64N(int64(25*time.Minute)), id})
		}
		// Emit events older than the newest start minus the disorder
		// bound, in arbitrary (generation) order within it.
		if id%2000 == 1999 || id == entities-1 {
			keep := buf[:0]
			for _, e := range buf {
				if e.t <= start-int64(disorder)/2 || id == entities-1 {
					_, err := p.Score(login{T: e.t, Account: "dev-" + strconv.Itoa(e.id)}, nil)
					require.NoError(t, err)
					events++
					if old, ok := lastOf[e.id]; !ok || e.t > old {
						if ok {
							perMinute[old/bucket]--
						}
						lastOf[e.id] = e.t
						perMinute[e.t/bucket]++
					}
					if events%100_000 == 0 {
						commit()
					}
				} else {
					keep = append(keep, e)
				}
			}
			buf = keep
			if len(lastOf) > 200_000 {
				for k, v := range lastOf {
					if v+int64(ttl)+int64(time.Hour) < p.expiryClock() {
						delete(lastOf, k)
					}
				}
			}
		}
	}
	commit()
	s := p.Stats()
	t.Logf("%d events, %d entities, %d commits; live at end %d, expired %d; worst live/active deviation %.2f%%; max store size %.1f MiB",
		events, entities, commits, s.LiveEntities, s.Expired, worst*100, float64(maxDisk)/(1<<20))
	require.Less(t, s.LiveEntities, int64(entities/100))
	// Bounded: a few thousand live records need a few MiB; allow for
	// deletion tombstones awaiting compaction.
	require.Less(t, maxDisk, uint64(256<<20))
}
