// Package monitor keeps a two-sided CUSUM per stream (pixel or tile), reads
// only a budget of streams per frame chosen by a sampling policy, and raises
// an alarm when the sum of the top-r local statistics crosses a calibrated
// control limit. It does no I/O: it hands out the stream indices it wants
// and takes their values as []float32. One goroutine owns an Engine.
package monitor
