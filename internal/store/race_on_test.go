//go:build race

package store

// raceEnabled makes the longest randomized tests run fewer seeds under the
// race detector, which slows Pebble about fifteenfold.
const raceEnabled = true
