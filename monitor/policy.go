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
