//go:build race

package ops

// raceEnabled is set when the race detector is on; it changes allocation counts.
const raceEnabled = true
