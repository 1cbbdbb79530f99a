package monitor

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// TestWindowPositions: windows cover every stream, stay inside the grid,
// and the cover ranges list exactly the windows holding each coordinate
// (checked by brute force).
func TestWindowPositions(t *testing.T) {
	for _, tc := range []struct{ n, size, stride int }{{128, 7, 2}, {10, 3, 3}, {9, 3, 3}, {5, 7, 2}, {1, 1, 1}, {17, 4, 4}, {17, 5, 4}} {
		pos := windowPositions(tc.n, tc.size, tc.stride)
		lo, hi := coverRange(tc.n, tc.size, pos)
		s := min(tc.size, tc.n)
		for x := 0; x < tc.n; x++ {
			var want []int32
			for a, p := range pos {
				if p < 0 || int(p)+s > tc.n {
					t.Fatalf("%+v: window %d at %d leaves the grid", tc, a, p)
				}
				if int(p) <= x && x < int(p)+s {
					want = append(want, int32(a))
				}
			}
			if len(want) == 0 {
				t.Fatalf("%+v: coordinate %d in no window", tc, x)
			}
			if lo[x] != want[0] || hi[x] != want[len(want)-1] || int(hi[x]-lo[x]+1) != len(want) {
				t.Fatalf("%+v: coordinate %d: range %d..%d, brute force %v", tc, x, lo[x], hi[x], want)
			}
		}
	}
}

// TestWindowMatchesDirect recomputes every pooled window CUSUM of the
// spatial policy directly from its definition (METHODS.md section 4: the
// log-likelihood-ratio CUSUM of Page 1954 on the sum of the values read in
// the window), and checks the engine's largest window statistic and its
// top-r sum of the per-stream CUSUMs each frame.
func TestWindowMatchesDirect(t *testing.T) {
	cfg := Config{Width: 23, Height: 17, Budget: 40, TopR: 5, Policy: Spatial, Seed: 3, SpatialWindow: 5, SpatialStride: 3, SpatialHot: 1}
	e := mustEngine(t, cfg)
	w, h, s := cfg.Width, cfg.Height, cfg.SpatialWindow
	type rect struct{ x0, y0 int }
	var wins []rect
	// Independent placement: every stride along each side, the last
	// window moved in to end at the edge.
	place := func(n int) []int {
		var p []int
		for x := 0; x+s < n; x += cfg.SpatialStride {
			p = append(p, x)
		}
		return append(p, n-s)
	}
	for _, y := range place(h) {
		for _, x := range place(w) {
			wins = append(wins, rect{x, y})
		}
	}
	m := w * h
	u, d := make([]float64, len(wins)), make([]float64, len(wins))
	pu, pd := make([]float64, m), make([]float64, m)
	c := e.Compensation()
	rng := rand.New(rand.NewPCG(5, 6))
	z := make([]float32, m)
	val := make([]float64, m)
	for f := 0; f < 800; f++ {
		idx := slices.Clone(e.Next())
		read := make([]bool, m)
		for k, i := range idx {
			z[k] = float32(rng.NormFloat64())
			if f > 400 && int(i)%w < 6 && int(i)/w < 6 {
				z[k] += 1
			}
			read[i] = true
			val[i] = float64(z[k])
		}
		upd, err := e.Step(z[:len(idx)], nil)
		if err != nil {
			t.Fatal(err)
		}
		best := cfg.SpatialHot
		for j, r := range wins {
			var sum float64
			n := 0
			for y := r.y0; y < r.y0+s; y++ {
				for x := r.x0; x < r.x0+s; x++ {
					if read[y*w+x] {
						sum += val[y*w+x]
						n++
					}
				}
			}
			if n > 0 {
				u[j] = math.Max(0, u[j]+sum-float64(n)/2)
				d[j] = math.Max(0, d[j]-sum-float64(n)/2)
			}
			best = math.Max(best, math.Max(u[j], d[j]))
		}
		if math.Abs(best-upd.GWindow) > 1e-3*math.Max(1, best) {
			t.Fatalf("frame %d: largest window statistic %v, direct %v", f, upd.GWindow, best)
		}
		ls := make([]float64, m)
		for i := range m {
			if read[i] {
				pu[i] = math.Max(0, pu[i]+val[i]-0.5)
				pd[i] = math.Max(0, pd[i]-val[i]-0.5)
			} else {
				pu[i] += c
				pd[i] += c
			}
			ls[i] = math.Max(pu[i], pd[i])
		}
		slices.Sort(ls)
		var g float64
		for _, v := range ls[m-cfg.TopR:] {
			g += v
		}
		if math.Abs(g-upd.GPixel) > 1e-3*math.Max(1, g) {
			t.Fatalf("frame %d: top-r sum %v, direct %v", f, upd.GPixel, g)
		}
		want := math.Max(g, e.Config().SpatialScale*best)
		if math.Abs(want-upd.G) > 1e-3*math.Max(1, want) {
			t.Fatalf("frame %d: G %v, want max(top-r sum, scale x window) = %v", f, upd.G, want)
		}
	}
}

// TestWindowCUSUMBrookEvans: with every stream of a 2 x 2 grid read each
// frame and one 2 x 2 window, the window statistic is U = max(0, U + sum z -
// n/2) with n = 4, i.e. 2 x the standard CUSUM of S = sum z / 2 ~ N(0,1)
// with k = 1 at limit h/2. Its zero-state run lengths must match the
// Brook & Evans (1972, Biometrika 59) Markov-chain ARL for k = 1, within 4%
// (Monte Carlo s.e. about 1.5%), in control and for a shift 0.5 of every
// stream (S has mean 1).
func TestWindowCUSUMBrookEvans(t *testing.T) {
	const h = 4.0 // window limit; h/2 = 2 for the standard chart
	for _, tc := range []struct {
		delta float64 // per-stream shift
		paths int
	}{{0, 4000}, {0.5, 4000}} {
		rng := rand.New(rand.NewPCG(21, uint64(10*tc.delta)))
		cfg := Config{Width: 2, Height: 2, Budget: 4, TopR: 1, Policy: Spatial, SpatialWindow: 2, SpatialHot: 0.5}
		e := mustEngine(t, cfg)
		z := make([]float32, 4)
		var sum float64
		for p := 0; p < tc.paths; p++ {
			e.Reset()
			for n := 1; ; n++ {
				idx := e.Next()
				if len(idx) != 4 {
					t.Fatalf("read %d streams, want all 4", len(idx))
				}
				for k := range idx {
					z[k] = float32(tc.delta + rng.NormFloat64())
				}
				upd, err := e.Step(z, nil)
				if err != nil {
					t.Fatal(err)
				}
				if upd.GWindow >= h {
					sum += float64(n)
					break
				}
			}
		}
		mu := 2 * tc.delta // mean of S = sum z / 2
		want := twoSided(brookEvansARL(h/2, 1, mu, 400), brookEvansARL(h/2, 1, -mu, 400))
		within(t, "window CUSUM ARL vs Brook-Evans (k=1, h=2, shift "+map[float64]string{0: "0", 0.5: "0.5"}[tc.delta]+")",
			sum/float64(tc.paths), want, 0.04)
	}
}

// TestSpatialBeatsAdaptiveOnBlob: on a blob change the pooled windows and
// their follow-up reads must detect faster than the adaptive rule of Liu,
// Mei & Shi (2015, Technometrics 57(3)) at the same calibrated ARL0, on the
// same simulated changes (64 x 64 grid, 3% budget, disk of radius 4, shift
// 1, ARL0 300); spatial must be faster by 2 s.e. of the difference.
func TestSpatialBeatsAdaptiveOnBlob(t *testing.T) {
	var cfgs []Config
	for _, p := range []Policy{Adaptive, Spatial} {
		cfg := Config{Width: 64, Height: 64, Budget: 123, TopR: 10, Policy: p}
		cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfg, TargetARL0: 300, Paths: 100, Verify: -1, Seed: 41})
		if err != nil {
			t.Fatal(err)
		}
		cfg.Limit = cal.Limit
		cfgs = append(cfgs, cfg)
	}
	res, err := Simulate(context.Background(), Scenario{Width: 64, Height: 64, Radius: 4, Shift: 1, Quiet: 100, Runs: 150, Seed: 42}, cfgs, nil)
	if err != nil {
		t.Fatal(err)
	}
	a, s := res[0], res[1]
	t.Logf("adaptive ADD %.2f ± %.2f (h = %.2f), spatial %.2f ± %.2f (h = %.2f): ratio %.2f", a.ADD, a.ADDSE, a.Limit, s.ADD, s.ADDSE, s.Limit, s.ADD/a.ADD)
	if s.ADD+2*math.Hypot(a.ADDSE, s.ADDSE) > a.ADD {
		t.Errorf("spatial ADD %.2f ± %.2f not clearly below adaptive %.2f ± %.2f on a blob", s.ADD, s.ADDSE, a.ADD, a.ADDSE)
	}
}
