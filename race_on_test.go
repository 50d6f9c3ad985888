//go:build race

package tallyward

// raceEnabled: the race detector's instrumentation allocates, so tests
// that count allocations skip under it.
const raceEnabled = true
