//go:build amd64 || arm64

package prefetch

// lineAt hints the cache line holding address a.
func lineAt(a uintptr)
