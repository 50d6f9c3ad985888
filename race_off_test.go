//go:build !race

package tallyward

const raceEnabled = false
