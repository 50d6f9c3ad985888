package store

import (
	"context"
	"fmt"
	"log/slog"

	"github.com/cockroachdb/pebble/v2"
)

// SlogLogger returns a pebble.Logger that sends Pebble's informational and
// error messages to l (with the attribute component=pebble). Fatalf is
// logged and then handled like the default logger's: it panics with the
// error the Store turns into a sticky ErrFailed, rather than exiting the
// process.
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
	quietLogger{}.Fatalf(format, args...)
}
