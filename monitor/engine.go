package monitor

import (
	"cmp"
	"fmt"
	"math"
	"math/bits"
	"math/rand/v2"
	"slices"
)

// Engine is the budgeted-read change detector for one grid of streams.
// It is not safe for concurrent use: one goroutine owns an engine.
//
// Per stream it keeps the two-sided CUSUM of Page (1954, Biometrika 41),
//
//	U = max(0, U + d*z - d*d/2),  D = max(0, D - d*z - d*d/2),  L = max(U, D),
//
// with U and D of unread streams raised by the compensation c each frame
// (Liu, Mei & Shi 2015, Technometrics 57(3)), and the global statistic
// G = sum of the r largest L (Mei 2010, Biometrika 97). The compensation is
// applied lazily: (U, D) are stored as of the stream's last update t_i and
// the current value is U_i + c*(t - t_i).
type Engine struct {
	cfg        Config
	m, q, r    int
	c, d, half float64

	u, dn    []float32 // U and D at the last update
	last     []int32   // frame (steps-1) of the last update
	zeroU    []int32   // last frame at which U was zero after an update
	zeroD    []int32   // same for D
	rank     *rankIndex
	t        int32 // frames stepped so far
	frameOff int

	// full policy fast path (stepFull): no rank upkeep per frame
	fast      bool      // Policy Full and not forced onto the general path
	heap      []float32 // min-heap of the r largest L of the frame
	syncFn    func()    // e.syncRank, bound once so marking stale allocates nothing
	resetLast int32     // e.last of every stream at the last resetStats

	read, next []int32  // streams read at this frame / to read at the next
	pick       []uint64 // bitmap used to emit picks in ascending order
	scrID      []int32
	scrKey     []float64
	rng        *rand.Rand

	// spatial policy: pooled window statistics
	win *windowSet

	// episodes and regions
	state       State
	episode     Alarm
	regions     []Region
	peakRegions []Region // regions at the episode's largest G
	regWork     regionWork
	limit       float64
	started     Alarm
	ended       Alarm
	sweepLen    int
	sink        float32 // keeps StatePass from being optimised away
	gBase       float64 // running in-control level of G (see EndLevel)
	baseN       int
}

// New validates cfg (after Defaults) and allocates every per-stream slice.
func New(cfg Config) (*Engine, error) {
	cfg = cfg.Defaults()
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	m := cfg.Streams()
	e := &Engine{
		cfg: cfg, m: m, q: cfg.Budget, r: cfg.TopR,
		c: cfg.Comp(), d: cfg.Shift, half: cfg.Shift * cfg.Shift / 2,
		u: make([]float32, m), dn: make([]float32, m),
		last: make([]int32, m), zeroU: make([]int32, m), zeroD: make([]int32, m),
		frameOff: cfg.FirstFrame,
		read:     make([]int32, 0, m), next: make([]int32, 0, m),
		pick:   make([]uint64, (m+63)/64),
		scrID:  make([]int32, m),
		scrKey: make([]float64, m),
		rng:    rand.New(rand.NewPCG(cfg.Seed, cfg.Seed^0x9e3779b97f4a7c15)),
		limit:  cfg.Limit,
	}
	if cfg.Policy == Full || cfg.Policy == Oracle {
		// Every stream read (full), or only the changed ones on purpose
		// (oracle): unread streams get no compensation, else they would
		// climb without end and the bound would be meaningless.
		e.c = 0
	}
	e.sweepLen = (m + e.q - 1) / e.q
	if cfg.Policy == Spatial {
		e.win = newWindowSet(cfg.Width, cfg.Height, cfg.SpatialWindow, cfg.SpatialStride, cfg.SpatialHot)
	}
	e.regWork.init(m)
	e.regions = make([]Region, 0, maxRegions)
	e.peakRegions = make([]Region, 0, maxRegions)
	e.rank = newRankIndex(m, e.c)
	e.fast = cfg.Policy == Full
	e.heap = make([]float32, 0, e.r)
	e.syncFn = e.syncRank
	e.Reset()
	return e, nil
}

// Config returns the engine's configuration with defaults filled in.
func (e *Engine) Config() Config { return e.cfg }

// Compensation returns the absolute compensation c in use.
func (e *Engine) Compensation() float64 { return e.c }

// Frames returns the number of frames stepped so far.
func (e *Engine) Frames() int { return int(e.t) }

// SetLimit changes the control limit h (e.g. after calibration).
func (e *Engine) SetLimit(h float64) { e.limit = h }

// Limit returns the control limit h.
func (e *Engine) Limit() float64 { return e.limit }

// Reset sets every statistic to zero, ends any episode and restarts the
// frame count at Config.FirstFrame.
func (e *Engine) Reset() {
	e.t = 0
	e.resetStats()
	e.state = Watching
	e.regions = e.regions[:0]
	e.gBase, e.baseN = 0, 0
}

func (e *Engine) resetStats() {
	clear(e.u)
	clear(e.dn)
	e.resetLast = e.t - 1
	for i := range e.last {
		e.last[i] = e.t - 1
		e.zeroU[i] = e.t - 1
		e.zeroD[i] = e.t - 1
	}
	e.rank.reset(-e.c * float64(e.t-1))
	if e.win != nil {
		e.win.reset(e.t - 1)
	}
	e.planNext()
}

// Next returns the streams to read at the coming frame, in ascending order.
// The slice is the engine's and stays valid until the next Step.
func (e *Engine) Next() []int32 { return e.next }

// onset returns the CUSUM change-point estimate of stream i: the frame
// after the last one at which its larger side was (near) zero.
func (e *Engine) onset(i int32) int {
	z := e.zeroU[i]
	if e.dn[i] > e.u[i] {
		z = e.zeroD[i]
	}
	return e.frameOff + int(z) + 1
}

// currentL returns stream i's local statistic as of the end of frame t.
func (e *Engine) currentL(i int32, t int32) float64 {
	return e.rank.key[i] + e.c*float64(t)
}

// Step consumes the values of the streams returned by Next: z[k] is the
// standardised value of stream Next()[k]; missing[k] (nil for none) marks a
// value that could not be read, which is treated as not read. It returns
// the frame's update.
func (e *Engine) Step(z []float32, missing []bool) (Update, error) {
	if len(z) != len(e.next) {
		return Update{}, fmt.Errorf("monitor: step got %d values for %d requested streams", len(z), len(e.next))
	}
	if missing != nil && len(missing) != len(z) {
		return Update{}, fmt.Errorf("monitor: step got %d missing flags for %d values", len(missing), len(z))
	}
	for k, v := range z {
		// All exponent bits set: NaN or infinite (bit test, cheap at m a frame).
		if math.Float32bits(v)&0x7f800000 == 0x7f800000 && (missing == nil || !missing[k]) {
			return Update{}, fmt.Errorf("monitor: value %d (stream %d) is %v; mark it missing instead", k, e.next[k], v)
		}
	}
	e.read, e.next = e.next, e.read
	t := e.t
	var g float64
	if e.fast {
		g = e.stepFull(z, missing)
	} else {
		e.stepRead(z, missing)
		g = e.topRSum(t)
	}
	upd := Update{Frame: e.frameOff + int(t), G: g, GPixel: g, Limit: e.limit, Read: e.read}
	if e.win != nil {
		e.win.update(t, float32(e.d))
		upd.GWindow = e.win.max
		g = max(g, e.cfg.SpatialScale*e.win.max)
		upd.G = g
	}
	e.t++
	e.episodeStep(&upd, t)
	e.planNext()
	return upd, nil
}

// stepRead updates the streams in e.read with their values and keeps the
// rank index in order: the general path, every policy.
func (e *Engine) stepRead(z []float32, missing []bool) {
	t := e.t
	c, d, half := float32(e.c), float32(e.d), float32(e.half)
	e.rank.slide(-e.c * float64(t))
	for k, i := range e.read {
		if missing != nil && missing[k] {
			continue
		}
		gap := float32(t - e.last[i] - 1) // unread frames since the last update
		u := e.u[i] + c*gap + d*z[k] - half
		dn := e.dn[i] + c*gap - d*z[k] - half
		// Onset bookkeeping: a side "restarts" when it ends a read within
		// one drift step d^2/2 of zero. Under sampling a rarely read stream
		// seldom lands exactly on zero (compensation lifts it), which would
		// push the classic last-zero estimate far before the change.
		if u <= half {
			u = max(u, 0)
			e.zeroU[i] = t
		}
		if dn <= half {
			dn = max(dn, 0)
			e.zeroD[i] = t
		}
		e.u[i], e.dn[i], e.last[i] = u, dn, t
		l := u
		if dn > l {
			l = dn
		}
		e.rank.set(i, float64(l)-e.c*float64(t))
		if e.win != nil {
			e.win.add(i, z[k])
		}
	}
}

// topRSum returns G at the end of frame t.
func (e *Engine) topRSum(t int32) float64 {
	n := e.rank.topK(e.r, e.scrID, e.scrKey, math.Inf(-1))
	var s float64
	ct := e.c * float64(t)
	for _, k := range e.scrKey[:n] {
		s += k + ct
	}
	return s
}

// Local writes every stream's current local statistic L into dst (grown if
// short) and returns it. O(m); meant for heat views, not the frame loop.
func (e *Engine) Local(dst []float32) []float32 {
	if cap(dst) < e.m {
		dst = make([]float32, e.m)
	}
	dst = dst[:e.m]
	t := e.t - 1
	if e.rank.stale != nil {
		for i := range dst {
			dst[i] = float32(e.keyOf(int32(i)) + e.c*float64(t))
		}
		return dst
	}
	for i := range dst {
		dst[i] = float32(e.currentL(int32(i), t))
	}
	return dst
}

// keyOf returns stream i's rank key from its state, the value Step gives
// the rank index: L at the last update minus c times that frame.
func (e *Engine) keyOf(i int32) float64 {
	l := e.u[i]
	if e.dn[i] > l {
		l = e.dn[i]
	}
	return float64(l) - e.c*float64(e.last[i])
}

// stepFull is Step's update for the full policy. Every stream is read and
// c = 0, so nothing needs ordering: one flat pass updates U and D with the
// general path's float32 arithmetic (same bits) and keeps the r largest L
// in a min-heap. Keeping the rank index in order cost ~50 ns a stream, most
// of the frame, so it is left stale and rebuilt (syncRank) only when
// something ranks streams, i.e. regions during an alarm.
//
// G is the same multiset of r values summed in another order: equal to the
// general path's bit for bit whenever that float64 sum is exact, which holds
// unless its nonzero float32 values span a ratio above about 2^29/r; past
// that the two may differ by float rounding.
func (e *Engine) stepFull(z []float32, missing []bool) float64 {
	t := e.t
	d, half := float32(e.d), float32(e.half)
	n := len(z)
	u, dn, last := e.u[:n], e.dn[:n], e.last[:n]
	zu, zd := e.zeroU[:n], e.zeroD[:n]
	e.heap = e.heap[:0]
	floor := float32(math.Inf(-1)) // smallest heap value once it holds r
	for i, v := range z {
		ui, di := u[i], dn[i]
		if missing == nil || !missing[i] {
			ui = ui + d*v - half
			di = di - d*v - half
			// Branch-free form of the general path's onset bookkeeping
			// (a random 50/50 branch per side costs more than the stores);
			// max(x, 0) is a no-op when x > half > 0.
			tu, td := zu[i], zd[i]
			if ui <= half {
				tu = t
			}
			if di <= half {
				td = t
			}
			ui, di = clampZero(ui), clampZero(di)
			u[i], dn[i], last[i], zu[i], zd[i] = ui, di, t, tu, td
		}
		// Both >= +0 and not NaN, where float order is the bits' order.
		l := math.Float32frombits(max(math.Float32bits(ui), math.Float32bits(di)))
		if l > floor {
			floor = e.offer(l)
		}
	}
	e.rank.stale = e.syncFn
	var s float64
	for _, l := range e.heap {
		s += float64(l)
	}
	return s
}

// clampZero returns max(x, 0) for x not NaN (-0 gives +0, as max does)
// without the branches max spends on NaN: a set sign bit clears x.
func clampZero(x float32) float32 {
	b := math.Float32bits(x)
	return math.Float32frombits(b &^ uint32(int32(b)>>31))
}

// offer adds l to the heap of the r largest values seen (the root is the
// smallest) and returns the value a later one must exceed to enter.
func (e *Engine) offer(l float32) float32 {
	h := e.heap
	if len(h) < e.r {
		h = append(h, l)
		for j := len(h) - 1; j > 0; { // sift up
			p := (j - 1) / 2
			if h[p] <= h[j] {
				break
			}
			h[p], h[j] = h[j], h[p]
			j = p
		}
		e.heap = h
		if len(h) < e.r {
			return float32(math.Inf(-1))
		}
		return h[0]
	}
	h[0] = l
	for j := 0; ; { // sift down
		c := 2*j + 1
		if c >= len(h) {
			break
		}
		if c+1 < len(h) && h[c+1] < h[c] {
			c++
		}
		if h[j] <= h[c] {
			break
		}
		h[j], h[c] = h[c], h[j]
		j = c
	}
	return h[0]
}

// syncRank rebuilds the rank index after fast full steps with the exact
// lists the general path would have left, so topK (regions, ties and the
// 64-region cap included) answers the same. That path links a stream at
// its bucket's head at each update, in ascending stream order within a
// frame, and resetStats links all in descending order; so linking the
// streams not updated since the reset in descending order, then the rest
// by (last update, stream) ascending, reproduces every list.
func (e *Engine) syncRank() {
	x := e.rank
	x.clearLists()
	m := int32(e.m)
	for i := m - 1; i >= 0; i-- {
		x.key[i] = e.keyOf(i)
		if e.last[i] == e.resetLast {
			x.place(i)
		}
	}
	now := e.t - 1
	older := e.scrID[:0] // topK overwrites it after this
	for i := int32(0); i < m; i++ {
		if l := e.last[i]; l != e.resetLast && l != now {
			older = append(older, i)
		}
	}
	slices.SortFunc(older, func(a, b int32) int {
		if c := cmp.Compare(e.last[a], e.last[b]); c != 0 {
			return c
		}
		return cmp.Compare(a, b)
	})
	for _, i := range older {
		x.place(i)
	}
	if now == e.resetLast {
		return
	}
	for i := int32(0); i < m; i++ {
		if e.last[i] == now {
			x.place(i)
		}
	}
}

// planNext fills e.next with the streams to read at frame e.t.
func (e *Engine) planNext() {
	if e.cfg.Policy == Full {
		// Both buffers only ever hold 0..m-1: fill each once.
		if len(e.next) != e.m {
			e.next = e.next[:0]
			for i := 0; i < e.m; i++ {
				e.next = append(e.next, int32(i))
			}
		}
		return
	}
	e.next = e.next[:0]
	switch e.cfg.Policy {
	case Stride:
		k := e.sweepLen
		for i := int(e.t) % k; i < e.m; i += k {
			e.next = append(e.next, int32(i))
		}
		return
	case Oracle:
		n := min(e.q, len(e.cfg.Oracle))
		for _, i := range e.cfg.Oracle[:n] {
			e.markPick(i)
		}
	case Random:
		// Floyd's algorithm: q distinct streams, uniformly (Bentley & Floyd
		// 1987, CACM 30(9), "Programming pearls: a sample of brilliance").
		for j := e.m - e.q; j < e.m; j++ {
			s := int32(e.rng.IntN(j + 1))
			if e.picked(s) {
				s = int32(j)
			}
			e.markPick(s)
		}
	case Adaptive:
		n := e.rank.topK(e.q, e.scrID, e.scrKey, math.Inf(-1))
		for _, i := range e.scrID[:n] {
			e.markPick(i)
		}
	case Thompson:
		e.planThompson()
	case Spatial:
		e.planSpatial()
	}
	e.emitPicks()
}

func (e *Engine) markPick(i int32)    { e.pick[i>>6] |= 1 << (uint(i) & 63) }
func (e *Engine) picked(i int32) bool { return e.pick[i>>6]&(1<<(uint(i)&63)) != 0 }
func (e *Engine) unmarkPick(i int32)  { e.pick[i>>6] &^= 1 << (uint(i) & 63) }
func (e *Engine) pickCount() (n int) {
	for _, w := range e.pick {
		n += bits.OnesCount64(w)
	}
	return n
}

// emitPicks moves the bitmap's set bits into e.next in ascending order and
// clears the bitmap. O(m/64 + q).
func (e *Engine) emitPicks() {
	for wi, w := range e.pick {
		for w != 0 {
			b := bits.TrailingZeros64(w)
			e.next = append(e.next, int32(wi*64+b))
			w &= w - 1
		}
		e.pick[wi] = 0
	}
}

// StatePass reads and writes every stream's state once (U, D, last update
// and rank key), as any method touching all m streams per frame must. It
// changes nothing and exists as the memory-bandwidth floor for benchmarks.
func (e *Engine) StatePass() {
	var acc float32
	for i := range e.u {
		u, d := e.u[i], e.dn[i]
		acc += u + d + float32(e.last[i]) + float32(e.rank.key[i])
		e.u[i], e.dn[i] = u, d
		e.last[i] = e.last[i] + 0
		e.rank.key[i] = e.rank.key[i] + 0
	}
	e.sink = acc
}
