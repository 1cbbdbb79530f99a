package monitor

import (
	"math"
)

// planThompson reads the q largest Gamma(eps + L_i, 1) draws. The draw is
// made over the min(m, 4q) streams of largest L: a stream below them has a
// statistic no larger than theirs and would be chosen with small
// probability; compensation lifts it into the candidates soon enough.
// Thompson (1933, Biometrika 25); for change detection under sampling
// control, Zhang & Mei (2023, Technometrics).
func (e *Engine) planThompson() {
	nc := min(e.m, 4*e.q)
	n := e.rank.topK(nc, e.scrID, e.scrKey, math.Inf(-1))
	ct := e.c * float64(e.t-1)
	eps := e.cfg.ThompsonEps
	for k := 0; k < n; k++ {
		l := e.scrKey[k] + ct
		if l < 0 {
			l = 0
		}
		e.scrKey[k] = gammaDraw(e.rng, eps+l)
	}
	selectTop(e.scrKey[:n], e.scrID[:n], e.q)
	for _, i := range e.scrID[:min(n, e.q)] {
		e.markPick(i)
	}
}

// gammaDraw returns a Gamma(alpha, 1) variate by Marsaglia & Tsang (2000,
// ACM TOMS 26(3), "A simple method for generating gamma variables"), with
// the alpha < 1 boost Gamma(alpha) = Gamma(alpha+1) * U^(1/alpha).
func gammaDraw(rng interface {
	Float64() float64
	NormFloat64() float64
}, alpha float64) float64 {
	boost := 1.0
	if alpha < 1 {
		boost = math.Pow(rng.Float64(), 1/alpha)
		alpha++
	}
	d := alpha - 1.0/3
	c := 1 / math.Sqrt(9*d)
	for {
		x := rng.NormFloat64()
		v := 1 + c*x
		if v <= 0 {
			continue
		}
		v = v * v * v
		u := rng.Float64()
		if u < 1-0.0331*x*x*x*x || math.Log(u) < 0.5*x*x+d*(1-v+math.Log(v)) {
			return d * v * boost
		}
	}
}

// planSpatial ranks each stream by max(L_i, a * max of L over its 8
// neighbours) and reads the q best, so that once one pixel of a blob is
// found its neighbours are read next. The ranking is exact: a stream
// outside the q largest L whose neighbours are all outside them too scores
// below the q-th largest L, so only the top q and their neighbours can win.
func (e *Engine) planSpatial() {
	n := e.rank.topK(e.q, e.scrID, e.scrKey, math.Inf(-1))
	t := e.t - 1
	w, h := e.cfg.Width, e.cfg.Height
	// Pool: the top q and their neighbours, deduplicated with e.mark.
	pool := n
	for k := 0; k < n; k++ {
		e.mark[e.scrID[k]] = 1
	}
	for k := 0; k < n; k++ {
		i := e.scrID[k]
		x, y := int(i)%w, int(i)/w
		for dy := -1; dy <= 1; dy++ {
			for dx := -1; dx <= 1; dx++ {
				xx, yy := x+dx, y+dy
				if (dx == 0 && dy == 0) || xx < 0 || yy < 0 || xx >= w || yy >= h {
					continue
				}
				j := int32(yy*w + xx)
				if e.mark[j] == 0 && pool < len(e.scrID) {
					e.mark[j] = 1
					e.scrID[pool] = j
					pool++
				}
			}
		}
	}
	a := e.cfg.SpatialWeight
	for k := 0; k < pool; k++ {
		i := e.scrID[k]
		x, y := int(i)%w, int(i)/w
		best := e.currentL(i, t)
		for dy := -1; dy <= 1; dy++ {
			for dx := -1; dx <= 1; dx++ {
				xx, yy := x+dx, y+dy
				if (dx == 0 && dy == 0) || xx < 0 || yy < 0 || xx >= w || yy >= h {
					continue
				}
				if v := a * e.currentL(int32(yy*w+xx), t); v > best {
					best = v
				}
			}
		}
		e.scrKey[k] = best
	}
	for k := 0; k < pool; k++ {
		e.mark[e.scrID[k]] = 0
	}
	selectTop(e.scrKey[:pool], e.scrID[:pool], e.q)
	for _, i := range e.scrID[:min(pool, e.q)] {
		e.markPick(i)
	}
}
