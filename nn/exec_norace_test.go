//go:build !race

package nn

// execRace is set when the race detector is on; it changes allocation counts.
const execRace = false
