package store

import (
	"context"
	"fmt"
	"log/slog"

	"github.com/cockroachdb/pebble/v2"
)

// SlogLogger returns a pebble.Logger that sends Pebble's messages to l
// (with the attribute component=pebble), for Options.Logger. The store
// handles fatal messages itself and passes them on as errors; a Fatalf
// called directly is logged as an error too.
func SlogLogger(l *slog.Logger) pebble.Logger {
	return slogLogger{l: l.With("component", "pebble")}
}

type slogLogger struct{ l *slog.Logger }

func (s slogLogger) Infof(format string, args ...any) {
	s.l.Log(context.Background(), slog.LevelInfo, fmt.Sprintf(format, args...))
}

func (s slogLogger) Errorf(format string, args ...any) {
	s.l.Log(context.Background(), slog.LevelError, fmt.Sprintf(format, args...))
}

func (s slogLogger) Fatalf(format string, args ...any) {
	s.l.Log(context.Background(), slog.LevelError, "fatal: "+fmt.Sprintf(format, args...))
}
