package tallyward

import (
	"bytes"
	"context"
	"encoding/binary"
	"strings"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward/sketch"
)

// Changing MaxDisorder between runs used to stop the pipeline at the
// first read of an active entity with a permanent "corrupt stored value".
// It is now a definition change of every feature, refused at Open with
// ErrDefinitionChanged naming them, and reset through ResetFeatures.
func TestMaxDisorderChangeIsADefinitionChange(t *testing.T) {
	evs := genLogins(11, 2_000, 100, 40, 0)
	for _, c := range []struct{ from, to time.Duration }{{time.Hour, 0}, {0, time.Hour}, {time.Minute, 10 * time.Second}} {
		dir := t.TempDir()
		spec := richSpec(nil)
		p, err := Open(spec, Options{Dir: dir, MaxDisorder: c.from})
		require.NoError(t, err)
		require.NoError(t, p.Feed(context.Background(), slice(evs[:1_000])))
		names := p.Names()
		require.NoError(t, p.Close())

		_, err = Open(spec, Options{Dir: dir, MaxDisorder: c.to})
		require.ErrorIs(t, err, ErrDefinitionChanged, "%v -> %v", c.from, c.to)
		require.ErrorContains(t, err, "MaxDisorder")
		for _, n := range names {
			require.ErrorContains(t, err, n)
		}

		p, err = Open(spec, Options{Dir: dir, MaxDisorder: c.to, ResetFeatures: names})
		require.NoError(t, err)
		require.NotEmpty(t, p.Notices())
		require.NoError(t, p.Feed(context.Background(), slice(evs[1_000:])), "%v -> %v", c.from, c.to)
		require.NoError(t, p.Close())
		p, err = Open(spec, Options{Dir: dir, MaxDisorder: c.to})
		require.NoError(t, err, "the new setting is recorded")
		require.NoError(t, p.Close())
	}
}

// A store made before MaxDisorder was recorded opens, records it, and
// says so.
func TestMaxDisorderRecordedForOlderStores(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	require.NoError(t, p.store.DeleteDefinition(defMaxDisorder))
	require.NoError(t, p.Close())
	p, err = Open(loginSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	require.Contains(t, strings.Join(p.Notices(), "\n"), "MaxDisorder")
	require.NoError(t, p.Close())
}

// Entity "a" with feature "b.c" and entity "a.b" with feature "c" would
// share one stored definition and one row name; such a spec is refused.
func TestDottedNamesCannotCollide(t *testing.T) {
	key := func(e login) string { return e.Account }
	spec := Spec[login]{Time: func(e login) int64 { return e.T }, Entities: []Entity[login]{
		{Name: "a", Key: key, Features: []Feature[login]{{Name: "b.c", Kind: SlidingCount{Window: time.Minute}}}},
		{Name: "a.b", Key: key, Features: []Feature[login]{{Name: "c", Kind: SlidingCount{Window: time.Hour}}}},
	}}
	_, err := Open(spec, Options{})
	require.ErrorContains(t, err, `"a.b.c"`)
	spec.Entities[1].Features[0].Name = "d"
	p, err := Open(spec, Options{})
	require.NoError(t, err, "dots are still allowed where they do not collide")
	require.Equal(t, []string{"a.b.c", "a.b.d"}, p.Names())
	require.NoError(t, p.Close())
}

// ResetFeatures names that match no feature, given or stored, are an
// error rather than silently ignored.
func TestResetFeaturesUnknownNameIsAnError(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	require.NoError(t, p.Close())
	_, err = Open(loginSpec(nil), Options{Dir: dir, ItemKey: testItemKey, ResetFeatures: []string{"addr.failed_10m", "addr.faild_10m"}})
	require.ErrorIs(t, err, ErrUnknownFeature)
	require.ErrorContains(t, err, "addr.faild_10m")
	_, err = Open(loginSpec(nil), Options{ResetFeatures: []string{"nope.nothing"}})
	require.ErrorIs(t, err, ErrUnknownFeature, "a new store too")
	// A removed feature is stored, so naming it is how it is dropped.
	spec := loginSpec(nil)
	spec.Entities[0].Features = spec.Entities[0].Features[1:]
	p, err = Open(spec, Options{Dir: dir, ItemKey: testItemKey, ResetFeatures: []string{"addr.failed_10m"}})
	require.NoError(t, err)
	require.NoError(t, p.Close())
}

// sipHash24 against the published vectors: Aumasson and Bernstein,
// "SipHash: a fast short-input PRF" (2012), Appendix A (key 00..0f,
// message 00..0e) and the first entry of the reference implementation's
// vector table (empty message), both quoted from memory.
func TestSipHashPublishedVectors(t *testing.T) {
	k0, k1 := uint64(0x0706050403020100), uint64(0x0f0e0d0c0b0a0908)
	msg := make([]byte, 15)
	for i := range msg {
		msg[i] = byte(i)
	}
	require.Equal(t, uint64(0xa129ca6149be45e5), sipHash24(k0, k1, string(msg)))
	require.Equal(t, uint64(0x726fdb47dd0e0e31), sipHash24(k0, k1, ""))

	// The stored forms of the item hashing are a persisted format.
	require.Equal(t, "xxh64", (&itemHashing{}).describe())
	stored := newItemHashing([]byte("0123456789abcdef"), false)
	require.Equal(t, "siphash-2-4 key=30313233343536373839616263646566", stored.describe())
	external := newItemHashing([]byte("0123456789abcdef"), true)
	require.Regexp(t, `^siphash-2-4 check=[0-9a-f]{32}$`, external.describe())
}

// itemSpec keeps item hashes of e-mail addresses in device records.
func itemSpec(emit func(Row[login])) Spec[login] {
	return Spec[login]{Time: func(e login) int64 { return e.T }, Emit: emit, Entities: []Entity[login]{
		{Name: "device", Key: func(e login) string { return e.Addr }, Features: []Feature[login]{
			{Name: "top_email", Kind: TopShare{Capacity: 4}, Item: func(e login) string { return e.Account }},
			{Name: "emails_1h", Kind: Distinct{Window: time.Hour}, Item: func(e login) string { return e.Account }},
		}},
	}}
}

// containsHash reports whether any record value holds h, little endian
// (as the lifetime and sketch encodings keep item hashes).
func containsHash(t *testing.T, db *pebble.DB, h uint64) bool {
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], h)
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: []byte{0x03}, UpperBound: []byte{0x04}})
	require.NoError(t, err)
	defer it.Close()
	for ok := it.First(); ok; ok = it.Next() {
		if bytes.Contains(it.Value(), b[:]) {
			return true
		}
	}
	return false
}

// Item hashes kept in other entities' records are keyed per store: the
// unkeyed XXH64 of a known item is not in the store, so a list of
// candidate items cannot be tested against it.
func TestItemHashesAreKeyedPerStore(t *testing.T) {
	evs := genLogins(17, 400, 30, 5, 0)
	victim := evs[0].Account
	run := func(opts Options) (*Pipeline[login], map[uint64]string) {
		rows := newRowLog()
		p, err := Open(itemSpec(rows.add), opts)
		require.NoError(t, err)
		t.Cleanup(func() { p.Close() })
		require.NoError(t, p.Feed(context.Background(), slice(evs)))
		require.NoError(t, p.Commit(nil))
		return p, rows.rows
	}
	unkeyed, _ := run(Options{UnkeyedItems: true})
	require.True(t, containsHash(t, unkeyed.store.DB(), sketch.HashString(victim)), "the check sees unkeyed hashes")

	dir := t.TempDir()
	p, rows := run(Options{Dir: dir})
	require.False(t, containsHash(t, p.store.DB(), sketch.HashString(victim)))
	key := p.ItemKey()
	require.Len(t, key, ItemKeySize)
	other, _ := run(Options{})
	require.NotEqual(t, key, other.ItemKey(), "a random key per store")

	// The same key gives the same rows in another store (a backfill).
	_, again := run(Options{ItemKey: key})
	require.Equal(t, rows, again)

	// The stored key is used on reopen and carried by snapshots.
	snap := t.TempDir() + "/snap"
	require.NoError(t, p.Snapshot(snap))
	require.NoError(t, p.Close())
	q, err := Open(itemSpec(nil), Options{Dir: snap})
	require.NoError(t, err)
	require.Equal(t, key, q.ItemKey())
	require.NoError(t, q.Close())
	_, err = Open(itemSpec(nil), Options{Dir: dir, ItemKey: []byte("another 16 bytes")})
	require.ErrorIs(t, err, ErrItemKey)
}

// A key given in Options stays outside the store: reopening needs it,
// and a wrong one is refused.
func TestExternalItemKeyStaysOutside(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(itemSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	require.NoError(t, p.Close())
	defs := func() string {
		db, err := pebble.Open(dir, &pebble.Options{})
		require.NoError(t, err)
		defer db.Close()
		v, closer, err := db.Get(append([]byte{0x02}, defItemHash...))
		require.NoError(t, err)
		defer closer.Close()
		return string(v)
	}()
	require.NotContains(t, defs, "key=")
	require.NotContains(t, defs, string(testItemKey))
	_, err = Open(itemSpec(nil), Options{Dir: dir})
	require.ErrorIs(t, err, ErrItemKey)
	_, err = Open(itemSpec(nil), Options{Dir: dir, ItemKey: []byte("another 16 bytes")})
	require.ErrorIs(t, err, ErrItemKey)
	_, err = Open(itemSpec(nil), Options{Dir: dir, UnkeyedItems: true})
	require.ErrorIs(t, err, ErrItemKey)
	p, err = Open(itemSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.NoError(t, err)
	require.NoError(t, p.Close())
	require.Error(t, (&Options{ItemKey: []byte("short")}).Validate())
}

// A store made before keyed hashing (no items/hash definition) keeps its
// unkeyed hashes, so its rows do not change, says so, and refuses a key.
func TestOlderStoreKeepsUnkeyedItems(t *testing.T) {
	evs := genLogins(19, 600, 30, 5, 0)
	dir := t.TempDir()
	p, err := Open(itemSpec(nil), Options{Dir: dir, UnkeyedItems: true})
	require.NoError(t, err)
	require.NoError(t, p.Feed(context.Background(), slice(evs[:300])))
	// Make it look like a store of the previous layout.
	require.NoError(t, p.store.DeleteDefinition(defItemHash))
	require.NoError(t, p.store.DeleteDefinition(defMaxDisorder))
	require.NoError(t, p.Close())

	_, err = Open(itemSpec(nil), Options{Dir: dir, ItemKey: testItemKey})
	require.ErrorIs(t, err, ErrItemKey)
	rows := newRowLog()
	p, err = Open(itemSpec(rows.add), Options{Dir: dir})
	require.NoError(t, err)
	require.Contains(t, strings.Join(p.Notices(), "\n"), "without a key")
	require.Nil(t, p.ItemKey())
	require.Equal(t, uint64(300), p.ResumeSeq())
	require.NoError(t, p.Feed(context.Background(), slice(evs[300:])))
	require.Len(t, rows.rows, 300)

	want := newRowLog()
	ref := openTest(t, itemSpec(want.add), Options{UnkeyedItems: true})
	require.NoError(t, ref.Feed(context.Background(), slice(evs)))
	for seq, r := range rows.rows {
		require.Equal(t, want.rows[seq], r, "row %d", seq)
	}
	require.NoError(t, p.Close())
}

// BenchmarkItemHash compares the keyed item hash with the unkeyed one it
// replaces, on an e-mail-sized item. Compare the two lines of one run
// (benchstat old.txt new.txt for changes to either).
func BenchmarkItemHash(b *testing.B) {
	item := "someone.else@example.org"
	keyed := newItemHashing(testItemKey, false)
	for _, c := range []struct {
		name string
		h    itemHashing
	}{{"unkeyed-xxh64", itemHashing{}}, {"keyed-siphash", keyed}} {
		b.Run(c.name, func(b *testing.B) {
			var sink uint64
			for range b.N {
				sink ^= c.h.hash(item)
			}
			_ = sink
		})
	}
}
