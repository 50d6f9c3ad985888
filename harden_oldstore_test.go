package tallyward

import (
	"context"
	"crypto/sha256"
	"fmt"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// testdata/store_v0 is a store written by the code before item hashes were
// keyed and MaxDisorder was recorded: richSpec, Settled, MaxDisorder 10s,
// the first 1,000 events of genLogins(41, 2000, 200, 50, 10s), closed.
// That code, reopening the store and replaying the rest, emitted the rows
// whose digest is below. The store must still open, say how it was carried
// forward, and give the same rows bit for bit. Kept for good.
func TestStoreFromBeforeKeyedHashesGivesTheSameRows(t *testing.T) {
	const want = "resume=964 rows=1027 sha256=18ceafad9d611071bcc077fb374c1665d3186da1b8db5ffa8a682fe38c1487e4\n"
	dir := filepath.Join(t.TempDir(), "store")
	require.NoError(t, CopySnapshot(filepath.Join("testdata", "store_v0"), dir))
	evs := genLogins(41, 2_000, 200, 50, 10*time.Second)
	log := newRowLog()
	p, err := Open(richSpec(log.add), Options{Dir: dir, MaxDisorder: 10 * time.Second, Mode: Settled, CommitEvery: -1})
	require.NoError(t, err)
	notices := strings.Join(p.Notices(), "\n")
	require.Contains(t, notices, "without a key")
	require.Contains(t, notices, "MaxDisorder")
	resume := p.ResumeSeq()
	require.NoError(t, p.Replay(context.Background(), Skip(slice(evs), resume)))
	h := sha256.New()
	for _, seq := range log.order {
		fmt.Fprintf(h, "%d %s\n", seq, log.rows[seq])
	}
	require.Equal(t, want, fmt.Sprintf("resume=%d rows=%d sha256=%x\n", resume, len(log.order), h.Sum(nil)))
	require.NoError(t, p.Close())

	// Now recorded: a changed MaxDisorder is refused, a key too.
	_, err = Open(richSpec(func(Row[login]) {}), Options{Dir: dir, MaxDisorder: time.Minute, Mode: Settled})
	require.ErrorIs(t, err, ErrDefinitionChanged)
	_, err = Open(richSpec(func(Row[login]) {}), Options{Dir: dir, MaxDisorder: 10 * time.Second, Mode: Settled, ItemKey: testItemKey})
	require.ErrorIs(t, err, ErrItemKey)
}
