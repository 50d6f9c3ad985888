//go:build tallyward_killpoints

package main

import (
	"os"
	"strconv"
	"strings"
	"syscall"
)

// killPoint, in binaries built for crash tests with the tag
// tallyward_killpoints, kills the process with SIGKILL at a chosen point:
// TALLYWARD_KILL=event:N (before event N is processed) or commit:K
// (inside the K-th commit, after the table is synced and before the state
// is written). Deterministic, unlike a kill from outside after a delay.
var killAt = func() (string, uint64) {
	kind, n, ok := strings.Cut(os.Getenv("TALLYWARD_KILL"), ":")
	if !ok {
		return "", 0
	}
	v, err := strconv.ParseUint(n, 10, 64)
	if err != nil {
		return "", 0
	}
	return kind, v
}

var killKind, killN = killAt()

func killPoint(kind string, n uint64) {
	if kind == killKind && n == killN {
		syscall.Kill(os.Getpid(), syscall.SIGKILL)
		select {}
	}
}
