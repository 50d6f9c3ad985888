package store

import (
	"bytes"
	"log/slog"
	"testing"

	"github.com/stretchr/testify/require"
)

// Pebble's messages reach the slog logger at their levels.
func TestSlogLogger(t *testing.T) {
	var buf bytes.Buffer
	l := SlogLogger(slog.New(slog.NewTextHandler(&buf, nil)))
	l.Infof("opened %d", 1)
	l.Errorf("disk %s", "slow")
	require.Contains(t, buf.String(), "level=INFO msg=\"opened 1\" component=pebble")
	require.Contains(t, buf.String(), "level=ERROR msg=\"disk slow\" component=pebble")
	l.Fatalf("wal %d", 7)
	require.Contains(t, buf.String(), "level=ERROR msg=\"fatal: wal 7\" component=pebble")
}
