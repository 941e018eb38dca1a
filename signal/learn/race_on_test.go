//go:build race

package learn

// raceEnabled: the race detector makes sync.Pool drop items at random, so
// allocation counts through the pool are meaningless under it.
const raceEnabled = true
