package tallyward

import (
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// TestSettledOrderIsFreeOfItemKey: two stores with different item keys
// (a backfill and the live store, say) must emit tied Settled rows in the
// same order. Only estimates of item sketches may differ between them
// (here the Space-Saving share, whose evictions follow the hashes).
func TestSettledOrderIsFreeOfItemKey(t *testing.T) {
	evs := genLogins(11, 5_000, 300, 80, 20*time.Second)
	run := func(key []byte) *rowLog {
		log := newRowLog()
		p := openTest(t, richSpec(log.add), Options{Mode: Settled, MaxDisorder: 20 * time.Second, ItemKey: key})
		require.NoError(t, p.Replay(t.Context(), slice(evs)))
		return log
	}
	a := run([]byte("0123456789abcdef"))
	b := run([]byte("fedcba9876543210"))
	require.Equal(t, a.order, b.order, "emission order")
}
