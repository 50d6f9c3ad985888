package join

import (
	"bytes"
	"context"
	"testing"

	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward/internal/attach"
)

// Forget with the pipeline's Erase leaves no byte of the key in the store
// after a compaction (invariant 5, DESIGN.md), though the interval and
// as-of joins held events and values of it.
func TestForgetWithEraseLeavesNoBytes(t *testing.T) {
	const victim = "victim-account-7"
	h := genHistory(12, 3000, 40, spanGap(3000, 20))
	end := h.evs[len(h.evs)-1].T
	h.evs = append(h.evs,
		act{T: end + minute, Kind: "payout", Acct: victim, ID: "v1", V: 5},
		act{T: end + 2*minute, Kind: "reset", Acct: victim, ID: "v2"},
		act{T: end + 3*minute, Kind: "verify", Acct: victim, ID: "v3", V: 2},
		act{T: end + 4*minute, Kind: "pay", Acct: victim, ID: "v4", V: 9},
		act{T: end + 20*minute, Kind: "pay", Acct: "a1", ID: "v5", V: 1})
	j := openJoined(t, settled(5*minute), funcSink(func(*TrainingRow) error { return nil }), func(Match[act]) {}, func(Attached[act]) {})
	defer j.p.Close()
	require.NoError(t, j.p.Feed(context.Background(), source(h.evs)))
	require.NoError(t, j.p.Commit(nil))
	st, ok := attach.Store(j.p)
	require.True(t, ok)
	contains := func() bool {
		db := st.DB()
		require.NoError(t, db.Compact(context.Background(), []byte{0x00}, []byte{0xff, 0xff}, true))
		it, err := db.NewIter(nil)
		require.NoError(t, err)
		defer it.Close()
		for ok := it.First(); ok; ok = it.Next() {
			if bytes.Contains(it.Key(), []byte(victim)) || bytes.Contains(it.Value(), []byte(victim)) {
				return true
			}
		}
		return false
	}
	require.True(t, contains())
	for _, part := range []string{"interval.reset-payout", "asof.verification"} {
		held := false
		require.NoError(t, st.ScanPart(part, func(k, v []byte) error {
			held = held || bytes.Contains(k, []byte(victim)) || bytes.Contains(v, []byte(victim))
			return nil
		}))
		require.True(t, held, "%s holds the key before", part)
	}

	j.iv.Forget(victim)
	j.ao.Forget(victim)
	require.NoError(t, j.p.Erase("account", victim))
	require.False(t, contains(), "no byte of the key after Forget, Erase and a compaction")
}
