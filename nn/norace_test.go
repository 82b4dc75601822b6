//go:build !race

package nn

// raceEnabled is set when the race detector is on; it changes allocation counts.
const raceEnabled = false
