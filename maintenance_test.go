package tallyward

import (
	"bytes"
	"context"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward/internal/store"
)

func countRecords(t testing.TB, db *pebble.DB) int {
	return len(dumpRecords(t, db))
}

func TestTTLExpiresIdleEntities(t *testing.T) {
	min := int64(time.Minute)
	p := openTest(t, loginSpec(nil), Options{TTL: 5 * time.Minute, CommitEvery: -1})
	for i, acct := range []string{"a", "b", "c"} {
		_, err := p.Score(login{T: t0 + int64(i), Account: acct, Addr: "x"}, nil)
		require.NoError(t, err)
	}
	require.NoError(t, p.Commit(nil))
	require.Equal(t, 4, countRecords(t, p.store.DB())) // 3 accounts, 1 address
	require.Equal(t, int64(4), p.Stats().LiveEntities)

	// Only "c" and the address stay busy for ten minutes.
	for m := int64(1); m <= 10; m++ {
		_, err := p.Score(login{T: t0 + m*min, Account: "c", Addr: "x"}, nil)
		require.NoError(t, err)
	}
	// Before any sweep, an expired record already reads as new.
	got, err := p.Score(login{T: t0 + 10*min + 1, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	require.Equal(t, 0.0, got[3], "prior_1h of an expired account reads empty")
	require.NoError(t, p.Commit(nil))
	s := p.Stats()
	require.Equal(t, uint64(1), s.Expired, "b expired; a was renewed before the sweep")
	require.Equal(t, int64(3), s.LiveEntities)
	require.Equal(t, 3, countRecords(t, p.store.DB()))
}

// With the default TTL (longest window + MaxDisorder), expiry never
// changes an answer: rows equal those of a run that never expires.
func TestDefaultTTLDoesNotChangeRows(t *testing.T) {
	evs := genLogins(3, 30_000, 5_000, 2_000, 2*time.Second)
	// Stretch time so that many entities go idle for longer than an hour.
	for i := range evs {
		evs[i].T = t0 + (evs[i].T-t0)*40
	}
	run := func(ttl time.Duration) (*rowLog, Stats) {
		rows := newRowLog()
		p := openTest(t, loginSpec(rows.add), Options{Mode: Settled, MaxDisorder: 80 * time.Second, TTL: ttl, CommitEvery: 1000})
		require.NoError(t, p.Replay(context.Background(), slice(evs)))
		return rows, p.Stats()
	}
	forever, s0 := run(-1)
	expiring, s1 := run(0)
	require.Equal(t, forever.rows, expiring.rows)
	require.Zero(t, s0.Expired)
	require.Positive(t, s1.Expired)
	require.Less(t, s1.LiveEntities, s0.LiveEntities)
	t.Logf("live entities: %d without expiry, %d with the default TTL (%d expired)", s0.LiveEntities, s1.LiveEntities, s1.Expired)
}

// Invariant 5 (DESIGN.md): after Erase and a manual compaction, no stored
// key or value contains the erased key's bytes; a replay of older history
// does not bring it back until LiftErasure.
func TestEraseLeavesNoBytes(t *testing.T) {
	const victim = "person-erase-me-7f3a"
	evs := genLogins(21, 20_000, 500, 300, 0)
	for i := range evs {
		if i%50 == 0 {
			evs[i].Account = victim
		}
	}
	rows := newRowLog()
	p := openTest(t, loginSpec(rows.add), Options{Mode: Settled, MaxDisorder: time.Second, Dir: t.TempDir(), CommitEvery: 3000})
	require.NoError(t, p.Feed(context.Background(), slice(evs[:15_000])))
	require.Positive(t, p.Stats().Held, "some events still held when erasing")
	require.NoError(t, p.Erase("account", victim))
	require.Equal(t, uint64(1), p.Stats().Erased)

	// Older history again (a replay after the erase) must not resurrect it.
	require.NoError(t, p.Feed(context.Background(), slice(evs[15_000:])))
	require.NoError(t, p.Flush())
	require.NoError(t, p.Commit(nil))
	require.Positive(t, p.Stats().ErasedSkips)

	db := p.store.DB()
	require.NoError(t, db.Compact(context.Background(), []byte{0x00}, []byte{0xff, 0xff}, true))
	it, err := db.NewIter(nil)
	require.NoError(t, err)
	keys := 0
	for ok := it.First(); ok; ok = it.Next() {
		keys++
		require.False(t, bytes.Contains(it.Key(), []byte(victim)), "key %q", it.Key())
		require.False(t, bytes.Contains(it.Value(), []byte(victim)), "value of %q", it.Key())
	}
	require.NoError(t, it.Close())
	require.Greater(t, keys, 100)

	// Rows of events naming the erased account read NaN for its features.
	for seq, r := range rows.rows {
		if evs[seq].Account == victim && seq >= 15_000 {
			require.Contains(t, r, " 7ff8000000000001", "row %d", seq)
		}
	}

	erased, err := p.Erased("account", victim)
	require.NoError(t, err)
	require.True(t, erased)
	require.NoError(t, p.LiftErasure("account", victim))
	erased, err = p.Erased("account", victim)
	require.NoError(t, err)
	require.False(t, erased)
	_, err = p.Erased("no-such-entity", victim)
	require.ErrorIs(t, err, ErrUnknownEntity)
	got, err := Open(loginSpec(rows.add), Options{})
	require.NoError(t, err)
	got.Close()
}

// Snapshot round trip: a snapshot copied to another directory and resumed
// gives the same later rows and final records as the original.
func TestSnapshotRoundTrip(t *testing.T) {
	evs := genLogins(31, 20_000, 2_000, 700, 2*time.Second)
	opts := Options{Mode: Settled, MaxDisorder: 2 * time.Second, Dir: t.TempDir(), CommitEvery: 2500}
	origRows := newRowLog()
	p := openTest(t, loginSpec(origRows.add), opts)
	require.NoError(t, p.Feed(context.Background(), slice(evs[:9_000])))
	snap := t.TempDir() + "/snap"
	require.NoError(t, p.Snapshot(snap))
	moved := t.TempDir() + "/moved"
	require.NoError(t, CopySnapshot(snap, moved))
	require.NoError(t, p.Replay(context.Background(), slice(evs[9_000:])))

	copyRows := newRowLog()
	opts.Dir = moved
	q := openTest(t, loginSpec(copyRows.add), opts)
	require.LessOrEqual(t, q.ResumeSeq(), uint64(9_000), "held events are re-read")
	require.Equal(t, uint64(9_000), q.store.Mark().Seen)
	require.NoError(t, q.Replay(context.Background(), Skip(slice(evs), q.ResumeSeq())))
	for seq, r := range copyRows.rows {
		require.Equal(t, origRows.rows[seq], r, "row %d", seq)
	}
	require.Equal(t, dumpRecords(t, p.store.DB()), dumpRecords(t, q.store.DB()))
	require.Equal(t, p.Stats().Applied, q.Stats().Applied)
}

func TestDefinitionReset(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir})
	require.NoError(t, err)
	for i := range 5 {
		_, err = p.Score(login{T: t0 + int64(i), Account: "a", Addr: "x"}, nil)
		require.NoError(t, err)
	}
	require.NoError(t, p.Close())

	spec := loginSpec(nil)
	spec.Entities[0].Features[0].Kind = SlidingCount{Window: 20 * time.Minute, Resolution: 10 * time.Second}
	spec.Entities[0].Features = append(spec.Entities[0].Features, Feature[login]{Name: "new_one", Kind: SlidingCount{Window: time.Hour}})
	_, err = Open(spec, Options{Dir: dir, ResetFeatures: []string{"addr.failed_10m"}})
	require.ErrorIs(t, err, ErrDefinitionChanged)
	require.ErrorContains(t, err, "addr.new_one is new")
	require.NotContains(t, err.Error(), "failed_10m", "listed features are not errors")

	p, err = Open(spec, Options{Dir: dir, ResetFeatures: []string{"addr.failed_10m", "addr.new_one"}})
	require.NoError(t, err)
	require.Len(t, p.Notices(), 2)
	require.Contains(t, strings.Join(p.Notices(), "\n"), "backfill")
	got, err := p.Score(login{T: t0 + 10, Account: "a", Addr: "x"}, nil)
	require.NoError(t, err)
	// failed_10m and new_one restart; all_1m and the account kept history.
	require.Equal(t, []float64{1, 6, 1, 6, 5}, got)
	require.NoError(t, p.Close())

	p, err = Open(spec, Options{Dir: dir})
	require.NoError(t, err, "the new definitions are now the stored ones")
	require.NoError(t, p.Close())
}

// Corrupt stored bytes give an error naming the key, never a panic, and
// stop the pipeline.
func TestCorruptRecordNamesKey(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	// A committed record, then its bytes overwritten behind the commit
	// protocol (the record count stays right).
	require.NoError(t, p.Process(login{T: t0 - 1, Account: "mallory", Addr: "x"}))
	require.NoError(t, p.Commit(nil))
	key := store.RecordKey(nil, "account", "mallory")
	require.NoError(t, p.store.DB().Set(key, []byte{1, 0x80}, pebble.Sync))
	require.NoError(t, p.Close())
	p = openTest(t, loginSpec(nil), Options{Dir: dir})
	_, err = p.Score(login{T: t0, Account: "mallory", Addr: "x"}, nil)
	require.ErrorIs(t, err, store.ErrCorrupt)
	require.ErrorContains(t, err, "mallory")
	_, err = p.Score(login{T: t0 + 1, Account: "someone", Addr: "x"}, nil)
	require.Error(t, err, "the pipeline stopped")
}

func TestEraseUnknownEntity(t *testing.T) {
	p := openTest(t, loginSpec(nil), Options{})
	require.ErrorIs(t, p.Erase("nope", "k"), ErrUnknownEntity)
	require.True(t, errors.Is(p.Erase("account", "never-seen"), nil))
	require.Equal(t, uint64(0), p.Stats().Erased)
}
