package monitor

import "math"

// rankIndex keeps every stream ordered by its key k_i = L_i - c*t_i, where
// L_i is the local statistic at the stream's last update t_i. An unread
// stream gains c per frame, so its current statistic is k_i + c*t and
// unread streams never change order (METHODS.md section 4, cost note).
// Only the streams read at a frame move, so keeping the order costs O(q)
// per frame instead of O(m).
//
// The keys are kept in a bucket queue: a ring of nb buckets of width w,
// each an intrusive doubly linked list (no allocation after construction),
// plus one overflow bucket for keys above the ring's window. Every live key
// is at least -c*t (a stream just reset to zero), so the window's bottom
// slides down with t; buckets leaving the top of the window are moved into
// overflow before their slot is reused.
type rankIndex struct {
	w, invW    float64
	nb         int64 // ring size (power of two)
	bottom     int64 // bucket number of the window's lowest bucket
	top        int64 // highest bucket number that may be non-empty
	head       []int32
	count      []int32
	next, prev []int32
	slot       []int32 // slot of each stream; int32(nb) = overflow
	key        []float64
	ovHead     int32
	ovCount    int

	// stale, when set, rebuilds keys and lists: the full policy's fast
	// path stops maintaining them (see Engine.stepFull), and topK calls it
	// first so only the frames that rank streams pay for the order.
	stale func()
}

const ringBuckets = 1 << 14

func newRankIndex(m int, c float64) *rankIndex {
	w := c
	if min := 64.0 / ringBuckets; w < min {
		w = min // the window must span local statistics up to at least 64
	}
	x := &rankIndex{
		w: w, invW: 1 / w, nb: ringBuckets,
		head:  make([]int32, ringBuckets),
		count: make([]int32, ringBuckets),
		next:  make([]int32, m), prev: make([]int32, m),
		slot: make([]int32, m), key: make([]float64, m),
		ovHead: -1,
	}
	x.reset(0)
	return x
}

// reset puts every stream at the given key (all statistics equal).
func (x *rankIndex) reset(key float64) {
	x.bottom = x.bucketOf(key)
	x.clearLists()
	for i := len(x.key) - 1; i >= 0; i-- {
		x.key[i] = key
		x.link(int32(i), x.bottom)
	}
}

// clearLists empties every bucket and the overflow, keeping the window.
func (x *rankIndex) clearLists() {
	for i := range x.head {
		x.head[i] = -1
		x.count[i] = 0
	}
	x.ovHead, x.ovCount = -1, 0
	x.top = x.bottom
	x.stale = nil
}

func (x *rankIndex) bucketOf(k float64) int64 { return int64(math.Floor(k * x.invW)) }

// slide moves the window's bottom down to floor(low/w), where low is a lower
// bound of every key from now on.
func (x *rankIndex) slide(low float64) {
	nb := x.bucketOf(low)
	for x.bottom > nb {
		x.bottom--
		// Slot of bucket bottom is the slot of bucket bottom+nb (old top).
		s := x.bottom & (x.nb - 1)
		for x.head[s] >= 0 {
			i := x.head[s]
			x.unlink(i)
			x.linkOverflow(i)
		}
		if x.top >= x.bottom+x.nb {
			x.top = x.bottom + x.nb - 1
		}
	}
}

// set changes stream i's key.
func (x *rankIndex) set(i int32, k float64) {
	x.unlink(i)
	x.key[i] = k
	x.place(i)
}

// place links unlinked stream i at the head of the bucket of its key.
func (x *rankIndex) place(i int32) {
	b := x.bucketOf(x.key[i])
	if b < x.bottom {
		b = x.bottom // rounding below -c*t
	}
	if b >= x.bottom+x.nb {
		x.linkOverflow(i)
		return
	}
	x.link(i, b)
}

func (x *rankIndex) link(i int32, b int64) {
	s := int32(b & (x.nb - 1))
	h := x.head[s]
	x.next[i], x.prev[i] = h, -1
	if h >= 0 {
		x.prev[h] = i
	}
	x.head[s] = i
	x.count[s]++
	x.slot[i] = s
	if b > x.top {
		x.top = b
	}
}

func (x *rankIndex) linkOverflow(i int32) {
	h := x.ovHead
	x.next[i], x.prev[i] = h, -1
	if h >= 0 {
		x.prev[h] = i
	}
	x.ovHead = i
	x.ovCount++
	x.slot[i] = int32(x.nb)
}

func (x *rankIndex) unlink(i int32) {
	s := x.slot[i]
	n, p := x.next[i], x.prev[i]
	if n >= 0 {
		x.prev[n] = p
	}
	if p >= 0 {
		x.next[p] = n
	} else if s == int32(x.nb) {
		x.ovHead = n
	} else {
		x.head[s] = n
	}
	if s == int32(x.nb) {
		x.ovCount--
	} else {
		x.count[s]--
	}
}

// topK writes the ids of the k largest keys into ids (len >= k) and their
// keys into keys, using scratch buffers of the same capacity, and returns
// the number written (min(k, m)). Order within the result is arbitrary.
// Streams whose key is below floor stop the walk early (pass -Inf for none).
func (x *rankIndex) topK(k int, ids []int32, keys []float64, floor float64) int {
	if x.stale != nil {
		x.stale()
	}
	n := 0
	take := func(h int32, cnt int) bool {
		// Append the whole list; report whether we have enough.
		for i := h; i >= 0; i = x.next[i] {
			if x.key[i] < floor {
				continue
			}
			ids[n], keys[n] = i, x.key[i]
			n++
			if n == len(ids) {
				return true
			}
		}
		return n >= k
	}
	finish := func(start int) int {
		// ids[start:n] is the boundary bucket: keep its largest k-start.
		if n > k {
			selectTop(keys[start:n], ids[start:n], k-start)
			n = k
		}
		return n
	}
	if x.ovCount > 0 {
		if take(x.ovHead, x.ovCount) {
			return finish(0)
		}
	}
	fb := x.bucketOf(floor)
	for b := x.top; b >= x.bottom; b-- {
		if b < fb && !math.IsInf(floor, -1) {
			break
		}
		s := b & (x.nb - 1)
		if x.head[s] < 0 {
			if b == x.top {
				x.top-- // lower the known top past empty buckets
			}
			continue
		}
		start := n
		if take(x.head[s], int(x.count[s])) {
			return finish(start)
		}
	}
	return n
}
