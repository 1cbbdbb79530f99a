//go:build race

package server

// raceEnabled lets tests that only measure sizes skip the slow race build.
const raceEnabled = true
