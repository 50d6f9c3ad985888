//go:build !tallyward_killpoints

package main

// killPoint is a no-op outside crash tests (see killpoint_on.go).
func killPoint(string, uint64) {}
