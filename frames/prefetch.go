package frames

import (
	"io"
	"sync"
)

// Prefetch wraps src so that the next depth frames are decoded in a second
// goroutine while the caller works on the current one. Decoded frames are
// copied into a ring of depth+2 buffers owned by the wrapper, so each item
// stays valid until the next call to Next, as with any Source. Items that
// read their pixels from storage on demand (FITS planes) cannot be read
// ahead: the wrapper hands such an item over and waits until the caller
// asks for the next one before it touches src again.
func Prefetch(src Source, depth int) Source {
	if depth < 1 {
		depth = 1
	}
	p := &prefetcher{src: src, out: make(chan fetched, depth), ack: make(chan struct{}), done: make(chan struct{}),
		ring: make([]Frame, depth+2)}
	go p.run()
	return p
}

type fetched struct {
	it   Item
	err  error
	lazy bool
}

type prefetcher struct {
	src      Source
	out      chan fetched
	ack      chan struct{} // the caller is done with a lazy item
	done     chan struct{}
	ring     []Frame
	waitAck  bool
	closeOne sync.Once
	finished bool
}

func (p *prefetcher) run() {
	defer close(p.out)
	slot := 0
	for {
		it, err := p.src.Next()
		f := fetched{it: it, err: err}
		if err == nil && it.Err == nil && it.Frame != nil {
			dst := &p.ring[slot]
			slot = (slot + 1) % len(p.ring)
			src := it.Frame
			dst.Reset(src.Width, src.Height)
			for y := 0; y < src.Height; y++ {
				copy(dst.Pix[y*dst.Stride:(y+1)*dst.Stride], src.Pix[y*src.Stride:y*src.Stride+src.Width])
			}
			f.it.Frame, f.it.Pixels = dst, dst
		} else if err == nil && it.Err == nil {
			f.lazy = true
		}
		select {
		case p.out <- f:
		case <-p.done:
			return
		}
		if err != nil {
			return
		}
		if f.lazy {
			select {
			case <-p.ack:
			case <-p.done:
				return
			}
		}
	}
}

// Next returns the next item, decoded ahead where it could be.
func (p *prefetcher) Next() (Item, error) {
	if p.waitAck {
		p.waitAck = false
		select {
		case p.ack <- struct{}{}:
		case <-p.done:
		}
	}
	f, ok := <-p.out
	if !ok {
		return Item{}, io.EOF
	}
	p.waitAck = f.lazy
	return f.it, f.err
}

// Len is src's.
func (p *prefetcher) Len() int { return p.src.Len() }

// Close stops the read-ahead and closes src.
func (p *prefetcher) Close() error {
	p.closeOne.Do(func() { close(p.done) })
	for range p.out {
	}
	return p.src.Close()
}
