package monitor

import "math"

// windowSet keeps the pooled window statistics of the spatial policy
// (METHODS.md section 4, "Pooled window statistic").
//
// The grid is covered by overlapping s x s windows placed every `stride`
// streams (the last row and column of windows are moved in to end at the
// grid's edge; a grid narrower than s has one window across it). For the
// n streams of window w read at a frame, with standardised values z_j,
// the pooled value S = sum z_j / sqrt(n) is N(0,1) in control whatever was
// read, and a shift delta over the whole window raises it by delta*sqrt(n).
// Each window keeps a two-sided CUSUM on the log-likelihood ratio of
// "every stream of the window shifted by d" against "none":
//
//	U = max(0, U + d*sqrt(n)*S - n d^2/2),  D = max(0, D - d*sqrt(n)*S - n d^2/2),
//
// Page's (1954, Biometrika 41) CUSUM with a per-frame design shift of
// d*sqrt(n) for S. A frame with nothing read in a window leaves it as it
// was. In control the increment has drift -n d^2/2 and variance n d^2, so
// the stationary tail P(U > x) is close to exp(-x) whatever the read rate
// (the usual exponential tail of a CUSUM of log-likelihood ratios; Siegmund
// 1985, Sequential Analysis, ch. 2): the window statistic needs no
// compensation. Pooling over a window is the spatial scan idea of
// Kulldorff (1997, Communications in Statistics - Theory and Methods 26)
// applied to fixed windows; choosing where to read from it follows the
// spatial-adaptive sampling of Wang, Xian, Tsung & Liu (2018, Journal of
// Quality Technology).
type windowSet struct {
	w, h     int // stream grid
	size     int // window side s
	nx, ny   int // windows per row and column
	x0, y0   []int32
	xlo, xhi []int32 // window columns holding stream column x: xlo[x] <= a <= xhi[x]
	ylo, yhi []int32
	u, dn    []float32
	zero     []int32 // last frame at which the window's larger side ended a read near zero
	sum      []float32
	cnt      []int32
	touched  []int32
	hotPos   []int32 // index in hot, -1 when not hot
	hot      []int32 // windows whose statistic is at least tau
	tau      float32
	hotID    []int32
	hotKey   []float64
	pixID    []int32
	pixKey   []float64
	max      float64 // largest window statistic after the last update (at least tau when none is hot)
	maxID    int32   // its window, -1 when none is hot
}

// windowPositions returns the left (or top) edges of the windows along a
// side of n streams.
func windowPositions(n, size, stride int) []int32 {
	if size >= n {
		return []int32{0}
	}
	var out []int32
	for p := 0; ; p += stride {
		if p+size >= n {
			out = append(out, int32(n-size))
			break
		}
		out = append(out, int32(p))
	}
	return out
}

// coverRange gives, for each stream coordinate, the first and last window
// (along that side) containing it. Positions are increasing, so the range
// is contiguous.
func coverRange(n, size int, pos []int32) (lo, hi []int32) {
	lo, hi = make([]int32, n), make([]int32, n)
	s := int32(min(size, n))
	a, b := 0, 0
	for x := int32(0); x < int32(n); x++ {
		for a < len(pos) && pos[a]+s <= x {
			a++
		}
		for b+1 < len(pos) && pos[b+1] <= x {
			b++
		}
		lo[x], hi[x] = int32(a), int32(b)
	}
	return lo, hi
}

func newWindowSet(w, h, size, stride int, tau float64) *windowSet {
	ws := &windowSet{w: w, h: h, size: size}
	ws.x0 = windowPositions(w, size, stride)
	ws.y0 = windowPositions(h, size, stride)
	ws.nx, ws.ny = len(ws.x0), len(ws.y0)
	ws.xlo, ws.xhi = coverRange(w, size, ws.x0)
	ws.ylo, ws.yhi = coverRange(h, size, ws.y0)
	n := ws.nx * ws.ny
	ws.u, ws.dn = make([]float32, n), make([]float32, n)
	ws.zero = make([]int32, n)
	ws.sum, ws.cnt = make([]float32, n), make([]int32, n)
	ws.touched = make([]int32, 0, n)
	ws.hotPos = make([]int32, n)
	ws.hot = make([]int32, 0, n)
	ws.hotID, ws.hotKey = make([]int32, n), make([]float64, n)
	s2 := min(size, w) * min(size, h)
	ws.pixID, ws.pixKey = make([]int32, s2), make([]float64, s2)
	ws.tau = float32(tau)
	ws.reset(-1)
	return ws
}

func (ws *windowSet) reset(t int32) {
	clear(ws.u)
	clear(ws.dn)
	clear(ws.sum)
	clear(ws.cnt)
	for i := range ws.hotPos {
		ws.hotPos[i] = -1
		ws.zero[i] = t
	}
	ws.hot = ws.hot[:0]
	ws.touched = ws.touched[:0]
	ws.max, ws.maxID = float64(ws.tau), -1
}

// rect returns window k's bounds, inclusive.
func (ws *windowSet) rect(k int32) (x0, y0, x1, y1 int) {
	a, b := int(k)%ws.nx, int(k)/ws.nx
	x0, y0 = int(ws.x0[a]), int(ws.y0[b])
	return x0, y0, min(x0+ws.size, ws.w) - 1, min(y0+ws.size, ws.h) - 1
}

// stat returns window k's statistic max(U, D).
func (ws *windowSet) stat(k int32) float32 { return max(ws.u[k], ws.dn[k]) }

// add pools one read value of stream i into every window holding it.
func (ws *windowSet) add(i int32, z float32) {
	x, y := int(i)%ws.w, int(i)/ws.w
	for b := ws.ylo[y]; b <= ws.yhi[y]; b++ {
		row := b * int32(ws.nx)
		for a := ws.xlo[x]; a <= ws.xhi[x]; a++ {
			k := row + a
			if ws.cnt[k] == 0 {
				ws.touched = append(ws.touched, k)
			}
			ws.cnt[k]++
			ws.sum[k] += z
		}
	}
}

// update closes frame t: every window read this frame takes its CUSUM
// step, the hot set follows, and max is refreshed.
func (ws *windowSet) update(t int32, d float32) {
	half := d * d / 2
	for _, k := range ws.touched {
		n := float32(ws.cnt[k])
		s := ws.sum[k]
		u := ws.u[k] + d*s - n*half
		dn := ws.dn[k] - d*s - n*half
		if u < 0 {
			u = 0
		}
		if dn < 0 {
			dn = 0
		}
		if max(u, dn) <= n*half {
			ws.zero[k] = t
		}
		ws.u[k], ws.dn[k] = u, dn
		ws.sum[k], ws.cnt[k] = 0, 0
		l := max(u, dn)
		switch p := ws.hotPos[k]; {
		case l >= ws.tau && p < 0:
			ws.hotPos[k] = int32(len(ws.hot))
			ws.hot = append(ws.hot, k)
		case l < ws.tau && p >= 0:
			last := ws.hot[len(ws.hot)-1]
			ws.hot[p] = last
			ws.hotPos[last] = p
			ws.hot = ws.hot[:len(ws.hot)-1]
			ws.hotPos[k] = -1
		}
	}
	ws.touched = ws.touched[:0]
	ws.max, ws.maxID = float64(ws.tau), -1
	for _, k := range ws.hot {
		if l := float64(ws.stat(k)); l >= ws.max {
			ws.max, ws.maxID = l, k
		}
	}
}

// sortedHot writes the (at most) n hot windows of largest statistic into
// ws.hotID[:k], largest first, and returns k.
func (ws *windowSet) sortedHot(n int) int {
	k := len(ws.hot)
	for j, w := range ws.hot {
		ws.hotID[j], ws.hotKey[j] = w, float64(ws.stat(w))
	}
	if n < k {
		selectTop(ws.hotKey[:k], ws.hotID[:k], n)
		k = n
	}
	// Insertion sort of the few selected, largest first.
	for i := 1; i < k; i++ {
		for j := i; j > 0 && ws.hotKey[j] > ws.hotKey[j-1]; j-- {
			ws.hotKey[j], ws.hotKey[j-1] = ws.hotKey[j-1], ws.hotKey[j]
			ws.hotID[j], ws.hotID[j-1] = ws.hotID[j-1], ws.hotID[j]
		}
	}
	return k
}

// planSpatial chooses the reads of the spatial policy. First the follow-up:
// the hot windows (statistic at least Config.SpatialHot), largest first,
// each get up to SpatialFollow reads of their streams of largest local
// statistic not yet picked, within a total of SpatialShare x q reads. Then
// the rest of the budget goes by the adaptive rule (largest L, unread
// streams compensated), which keeps exploring and keeps the per-stream
// CUSUMs, so single-stream changes are still caught.
func (e *Engine) planSpatial() {
	ws := e.win
	picked := 0
	capF := int(e.cfg.SpatialShare * float64(e.q))
	per := e.cfg.SpatialFollow
	if capF > 0 && len(ws.hot) > 0 {
		nh := ws.sortedHot((capF + per - 1) / per)
		ct := e.c * float64(e.t-1)
		for j := 0; j < nh && picked < capF; j++ {
			x0, y0, x1, y1 := ws.rect(ws.hotID[j])
			np := 0
			for y := y0; y <= y1; y++ {
				for x := x0; x <= x1; x++ {
					i := int32(y*e.cfg.Width + x)
					if e.picked(i) {
						continue
					}
					ws.pixID[np], ws.pixKey[np] = i, e.rank.key[i]+ct
					np++
				}
			}
			take := min(per, capF-picked, np)
			selectTop(ws.pixKey[:np], ws.pixID[:np], take)
			for _, i := range ws.pixID[:take] {
				e.markPick(i)
			}
			picked += take
		}
	}
	n := e.rank.topK(e.q, e.scrID, e.scrKey, math.Inf(-1))
	for _, i := range e.scrID[:n] {
		if picked >= e.q {
			break
		}
		if !e.picked(i) {
			e.markPick(i)
			picked++
		}
	}
}

// windowRegions adds, during an alarm, a region for each window whose
// scaled statistic reaches the limit's seed level h/2 and that overlaps no
// region found so far: the window part of G can alarm before any single
// stream's statistic stands out.
func (e *Engine) windowRegions() {
	ws := e.win
	seed := e.limit / 2 / e.cfg.SpatialScale
	n := ws.sortedHot(len(ws.hot))
	for j := 0; j < n && len(e.regions) < maxRegions; j++ {
		if ws.hotKey[j] < seed {
			break
		}
		k := ws.hotID[j]
		x0, y0, x1, y1 := ws.rect(k)
		overlap := false
		for _, r := range e.regions {
			if x0 <= r.X1 && r.X0 <= x1 && y0 <= r.Y1 && r.Y0 <= y1 {
				overlap = true
				break
			}
		}
		if overlap {
			continue
		}
		e.regions = append(e.regions, Region{X0: x0, Y0: y0, X1: x1, Y1: y1,
			CX: float64(x0+x1) / 2, CY: float64(y0+y1) / 2, Area: (x1 - x0 + 1) * (y1 - y0 + 1),
			Peak: ws.hotKey[j] * e.cfg.SpatialScale, Onset: e.frameOff + int(ws.zero[k]) + 1})
	}
}
