//go:build race

package live

// raceEnabled skips the long end-to-end run under the race detector, where
// it would take minutes; it is deterministic, so the plain run covers it.
const raceEnabled = true
