package main

import (
	"os"
	"testing"
)

func TestMain(m *testing.M) {
	maybeRunMember() // a child started by runDemo: be an instance
	os.Exit(m.Run())
}

// TestDemo runs the demo with real processes: three instances, one killed
// with SIGKILL, one added; it fails unless every payment's row is read
// exactly once. About 10 s (the killed instance's session and transaction
// must time out), so not under -short.
func TestDemo(t *testing.T) {
	if testing.Short() {
		t.Skip("starts four processes and waits out a session timeout")
	}
	if err := runDemo(6000); err != nil {
		t.Fatal(err)
	}
}
