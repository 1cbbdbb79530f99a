package live

import (
	"context"
	"sync/atomic"
	"time"
)

// Frame is one image as it arrived: the encoded bytes (JPEG or PNG; the
// consumer decodes, e.g. with frames.Decode) and when it came.
type Frame struct {
	Seq     uint64    // arrival number from 0 over good frames, dropped ones included
	Name    string    // where it came from: the URL with "#part N", or the file name
	Data    []byte    // owned by the receiver
	Format  string    // "jpeg" or "png" by signature, "" if neither
	Arrived time.Time // when the last byte was read
}

// Counts are a source's running totals, safe to read at any time.
type Counts struct {
	Received   uint64 // good frames read from the source
	Queued     uint64 // frames handed to the queue and not dropped (some may still wait there)
	Dropped    uint64 // frames discarded because the consumer was behind
	Bad        uint64 // parts or files skipped as corrupt, too large or cut off
	Reconnects uint64 // connection attempts after the first
}

// counters backs Counts with atomics, so Counts can be read from any
// goroutine while the source runs.
type counters struct {
	received, queued, dropped, bad, reconnects atomic.Uint64
}

func (c *counters) snapshot() Counts {
	return Counts{
		Received: c.received.Load(), Queued: c.queued.Load(), Dropped: c.dropped.Load(),
		Bad: c.bad.Load(), Reconnects: c.reconnects.Load(),
	}
}

// queue is the bounded hand-over to the consumer. With drop set, a full
// queue discards its oldest frame, so the consumer always gets the freshest
// ones and the reader never blocks; without it the reader waits.
type queue struct {
	ch   chan Frame
	drop bool
	n    *counters
}

func newQueue(size int, drop bool, n *counters) *queue {
	return &queue{ch: make(chan Frame, max(size, 1)), drop: drop, n: n}
}

// put hands f over; only one goroutine may call it. It returns ctx.Err()
// when it had to wait and ctx ended.
func (q *queue) put(ctx context.Context, f Frame) error {
	q.n.received.Add(1)
	if !q.drop {
		select {
		case q.ch <- f:
			q.n.queued.Add(1)
			return nil
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	for {
		select {
		case q.ch <- f:
			q.n.queued.Add(1)
			return nil
		default:
		}
		// Full: take back the oldest waiting frame. The consumer may have
		// taken it meanwhile, then the send above succeeds next round.
		select {
		case <-q.ch:
			q.n.queued.Add(^uint64(0)) // it was counted when queued
			q.n.dropped.Add(1)
		default:
		}
	}
}

// formatOf names the image format by its signature (PNG: ISO 15948 5.2;
// JPEG: SOI marker FF D8, ITU-T T.81 B.1.1.3).
func formatOf(b []byte) string {
	switch {
	case len(b) >= 8 && string(b[:8]) == "\x89PNG\r\n\x1a\n":
		return "png"
	case len(b) >= 3 && b[0] == 0xFF && b[1] == 0xD8 && b[2] == 0xFF:
		return "jpeg"
	}
	return ""
}
