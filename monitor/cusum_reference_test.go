package monitor

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"
)

// brookEvansARL returns the zero-state ARL of the one-sided CUSUM
// S = max(0, S + X - k), alarm at S >= h, X ~ N(mu, 1), by the Markov
// chain approximation of Brook & Evans (1972, Biometrika 59, "An approach
// to the probability distribution of CUSUM run length"): n transient states
// of width w = 2h/(2n-1), state i standing for S = i w, state 0 for
// S < w/2; the ARL vector solves (I - R) a = 1.
func brookEvansARL(h, k, mu float64, n int) float64 {
	phi := distuv.UnitNormal
	w := 2 * h / float64(2*n-1)
	a := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		base := k - mu - float64(i)*w
		for j := 0; j < n; j++ {
			var p float64
			if j == 0 {
				p = phi.CDF(w/2 + base)
			} else {
				p = phi.CDF((float64(j)+0.5)*w+base) - phi.CDF((float64(j)-0.5)*w+base)
			}
			v := -p
			if i == j {
				v += 1
			}
			a.Set(i, j, v)
		}
	}
	ones := mat.NewVecDense(n, nil)
	for i := 0; i < n; i++ {
		ones.SetVec(i, 1)
	}
	var arl mat.VecDense
	if err := arl.SolveVec(a, ones); err != nil {
		return math.NaN()
	}
	return arl.AtVec(0)
}

// twoSided combines the one-sided ARLs of the upper and lower charts by
// 1/ARL = 1/ARL_up + 1/ARL_down (Lucas & Crosier 1982, Technometrics 24,
// citing van Dobben de Bruyn 1968; from memory). It is not exact when both
// sides are nonzero at once, which the Monte Carlo comparison below checks.
func twoSided(up, down float64) float64 { return 1 / (1/up + 1/down) }

// siegmundARL is Siegmund's (1985, Sequential Analysis) approximation of the
// one-sided CUSUM ARL: (exp(-2ab) + 2ab - 1) / (2a^2), a = mu - k,
// b = h + 1.166 (b^2 when a = 0).
func siegmundARL(h, k, mu float64) float64 {
	a, b := mu-k, h+1.166
	if a == 0 {
		return b * b
	}
	return (math.Exp(-2*a*b) + 2*a*b - 1) / (2 * a * a)
}

// engineRunLengths runs paths of a 1x1 engine (Full policy, design shift 1,
// so G = max(U, D) of the two-sided CUSUM with k = 1/2 and h_engine = h)
// from zero state, with N(mu, 1) values, until G reaches the largest level,
// and returns the mean run length at each level (first passage: one path
// gives every level's run length).
func engineRunLengths(t *testing.T, mu float64, paths int, hs []float64, seed uint64) []float64 {
	t.Helper()
	top := hs[len(hs)-1]
	sum := make([]float64, len(hs))
	rng := rand.New(rand.NewPCG(seed, 1))
	z := make([]float32, 1)
	for p := 0; p < paths; p++ {
		eng, err := New(Config{Width: 1, Height: 1, Budget: 1, TopR: 1, Shift: 1, Policy: Full})
		if err != nil {
			t.Fatal(err)
		}
		next := 0
		for n := 1; next < len(hs); n++ {
			if n > 1e7 {
				t.Fatalf("path %d did not reach %v in %d frames", p, top, n)
			}
			eng.Next()
			z[0] = float32(mu + rng.NormFloat64())
			upd, err := eng.Step(z, nil)
			if err != nil {
				t.Fatal(err)
			}
			for next < len(hs) && upd.G >= hs[next] {
				sum[next] += float64(n)
				next++
			}
		}
	}
	for i := range sum {
		sum[i] /= float64(paths)
	}
	return sum
}

func within(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.Abs(got-want) > tol*want {
		t.Errorf("%s = %.4g, want %.4g within %.0f%%", what, got, want, 100*tol)
	} else {
		t.Logf("%s = %.4g (reference %.4g, tolerance %.0f%%)", what, got, want, 100*tol)
	}
}

// TestCUSUMReferenceARL checks the engine's single two-sided CUSUM (k = 1/2)
// against an independent Brook-Evans Markov chain (within 3%), Montgomery's
// table, and Siegmund's approximation.
func TestCUSUMReferenceARL(t *testing.T) {
	const k = 0.5
	hs := []float64{4, 5}
	// Montgomery, Introduction to Statistical Quality Control, table of
	// two-sided tabular-CUSUM ARLs for k = 1/2 (from memory): in control
	// 168 (h = 4) and 465 (h = 5); at a 1-sigma shift 8.38 and 10.4.
	table0 := []float64{168, 465}
	table1 := []float64{8.38, 10.4}

	paths0, paths1 := 6000, 3000
	if testing.Short() {
		paths0, paths1 = 3000, 2000
	}
	mc0 := engineRunLengths(t, 0, paths0, hs, 11)
	mc1 := engineRunLengths(t, 1, paths1, hs, 12)
	mcTol := 0.03
	if testing.Short() {
		mcTol = 0.06 // s.e. about 1.8% with 3000 paths
	}
	for i, h := range hs {
		up0 := brookEvansARL(h, k, 0, 400)
		be0 := twoSided(up0, up0) // symmetric in control
		be1 := twoSided(brookEvansARL(h, k, 1, 400), brookEvansARL(h, k, -1, 400))
		name := func(s string) string { return s + " h=" + map[float64]string{4: "4", 5: "5"}[h] }

		within(t, name("engine Monte Carlo ARL0 vs Brook-Evans"), mc0[i], be0, mcTol)
		within(t, name("engine Monte Carlo ARL1 vs Brook-Evans"), mc1[i], be1, mcTol)
		within(t, name("Brook-Evans ARL0 vs Montgomery table"), be0, table0[i], 0.05)
		within(t, name("Brook-Evans ARL1 vs Montgomery table"), be1, table1[i], 0.05)
		within(t, name("engine Monte Carlo ARL0 vs Montgomery table"), mc0[i], table0[i], 0.05)
		within(t, name("engine Monte Carlo ARL1 vs Montgomery table"), mc1[i], table1[i], 0.05)

		s0 := siegmundARL(h, k, 0)
		within(t, name("Siegmund ARL0 vs Brook-Evans"), twoSided(s0, s0), be0, 0.05)
		within(t, name("Siegmund ARL1 vs Brook-Evans"), twoSided(siegmundARL(h, k, 1), siegmundARL(h, k, -1)), be1, 0.05)
	}
}

// TestBrookEvansConverges checks the chain itself: refining the grid must
// change the ARL by well under the tolerances used above.
func TestBrookEvansConverges(t *testing.T) {
	a, b := brookEvansARL(4, 0.5, 0, 200), brookEvansARL(4, 0.5, 0, 400)
	if math.Abs(a-b) > 0.005*b {
		t.Errorf("Brook-Evans ARL moved from %.4g (n=200) to %.4g (n=400)", a, b)
	}
	// At h = 0 the chart alarms at the first X > k: ARL = 1/(1 - Phi(k)).
	want := 1 / (1 - distuv.UnitNormal.CDF(0.5))
	if got := brookEvansARL(1e-9, 0.5, 0, 1); math.Abs(got-want) > 1e-6*want {
		t.Errorf("h=0 ARL = %v, want %v", got, want)
	}
}
