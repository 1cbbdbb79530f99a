//go:build race

package web_test

// raceEnabled: the race detector slows the server's calibration about
// tenfold; the browser test then skips it with a fixed limit.
const raceEnabled = true
