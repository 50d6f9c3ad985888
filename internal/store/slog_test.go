package store

import (
	"bytes"
	"log/slog"
	"testing"

	"github.com/stretchr/testify/require"
)

// Pebble's messages reach the slog logger, and Fatalf still becomes the
// panic the Store recovers into ErrFailed rather than exiting.
func TestSlogLogger(t *testing.T) {
	var buf bytes.Buffer
	l := SlogLogger(slog.New(slog.NewTextHandler(&buf, nil)))
	l.Infof("opened %d", 1)
	l.Errorf("disk %s", "slow")
	require.Contains(t, buf.String(), "level=INFO msg=\"opened 1\" component=pebble")
	require.Contains(t, buf.String(), "level=ERROR msg=\"disk slow\" component=pebble")
	func() {
		defer func() {
			f, ok := recover().(fatalError)
			require.True(t, ok)
			require.ErrorContains(t, f.err, "pebble: wal 7")
		}()
		l.Fatalf("wal %d", 7)
	}()
	require.Contains(t, buf.String(), "fatal: wal 7")
}
