package monitor

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// TestRobustModel checks location/scale against gonum's quantile and a
// direct MAD, the scale floor on a constant pixel, dead streams, and that
// standardised in-control values have mean ~0 and sd ~1.
func TestRobustModel(t *testing.T) {
	const m, n = 4, 201
	lr, err := NewLearner(m, n, ModelOptions{})
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	cols := make([][]float64, m)
	frame := make([]float32, m)
	for f := 0; f < n; f++ {
		frame[0] = float32(100 + 4*rng.NormFloat64())
		frame[1] = 7                   // a quiet pixel: zero spread
		frame[2] = float32(math.NaN()) // a dead pixel
		frame[3] = float32(rng.ExpFloat64())
		for i := range frame {
			cols[i] = append(cols[i], float64(frame[i]))
		}
		if err := lr.Add(frame); err != nil {
			t.Fatal(err)
		}
	}
	md, err := lr.Model()
	if err != nil {
		t.Fatal(err)
	}
	for _, i := range []int{0, 3} {
		s := append([]float64(nil), cols[i]...)
		sortFloat64s(s)
		med := stat.Quantile(0.5, stat.Empirical, s, nil) // gonum reference
		if math.Abs(float64(md.Loc[i])-med) > 1e-4*math.Max(1, math.Abs(med)) {
			t.Errorf("stream %d: location %v, gonum median %v", i, md.Loc[i], med)
		}
	}
	// 1.4826 * MAD estimates sigma for normal data (Rousseeuw & Croux 1993, JASA 88).
	if got := float64(md.Scale[0]); math.Abs(got-4)/4 > 0.15 {
		t.Errorf("robust scale of N(100, 4^2) = %v, want about 4", got)
	}
	if md.Scale[1] != DefaultScaleFloor || md.Floored != 1 {
		t.Errorf("quiet pixel scale %v (floored %d), want the floor %v", md.Scale[1], md.Floored, DefaultScaleFloor)
	}
	if !md.Dead[2] {
		t.Error("all-NaN pixel not marked dead")
	}
	idx := []int32{0, 1, 2, 3}
	z := make([]float32, 4)
	miss := make([]bool, 4)
	md.Standardize(z, miss, idx, []float32{108, 8, 5, float32(math.NaN())})
	if math.Abs(float64(z[0])-float64((108-md.Loc[0])/md.Scale[0])) > 1e-6 || z[1] != 2 || !miss[2] || !miss[3] || miss[0] {
		t.Errorf("Standardize = %v missing %v", z, miss)
	}
}

// TestNormalScores checks van der Waerden scores (1952) against gonum's
// normal quantile, and that a skewed pixel becomes close to N(0,1).
func TestNormalScores(t *testing.T) {
	const n = 99
	lr, _ := NewLearner(1, n, ModelOptions{Kind: NormalScore})
	rng := rand.New(rand.NewPCG(3, 4))
	for f := 0; f < n; f++ {
		lr.Add([]float32{float32(rng.ExpFloat64())})
	}
	md, err := lr.Model()
	if err != nil {
		t.Fatal(err)
	}
	// Below every reference value: rank 0, u = 0.5/(n+1).
	z := make([]float32, 1)
	miss := make([]bool, 1)
	md.Standardize(z, miss, []int32{0}, []float32{-1})
	want := distuv.UnitNormal.Quantile(0.5 / (n + 1))
	if math.Abs(float64(z[0])-want) > 1e-5 {
		t.Errorf("score below all = %v, want %v", z[0], want)
	}
	// Exactly the median reference value: mid-rank 49.5 -> u = 50/100 -> 0.
	ref := md.sorted[:n]
	md.Standardize(z, miss, []int32{0}, []float32{ref[49]})
	if math.Abs(float64(z[0])) > 1e-6 {
		t.Errorf("score of the median = %v, want 0", z[0])
	}
	// Exchangeability: a fresh value from the same distribution as the n
	// reference values has a rank uniform on 0..n, whatever the distribution,
	// so across many streams its score has mean 0 and the sd of the score
	// table. Each of m streams gets its own skewed reference sample.
	const m = 4000
	lr, _ = NewLearner(m, n, ModelOptions{Kind: NormalScore})
	frame := make([]float32, m)
	for f := 0; f < n; f++ {
		for i := range frame {
			frame[i] = float32(rng.ExpFloat64() * float64(1+i%7))
		}
		lr.Add(frame)
	}
	md, _ = lr.Model()
	idx := make([]int32, m)
	for i := range frame {
		idx[i] = int32(i)
		frame[i] = float32(rng.ExpFloat64() * float64(1+i%7))
	}
	zs := make([]float32, m)
	md.Standardize(zs, make([]bool, m), idx, frame)
	xs := make([]float64, m)
	for i, v := range zs {
		xs[i] = float64(v)
	}
	var ss float64
	for r := 0; r <= n; r++ {
		q := distuv.UnitNormal.Quantile((float64(r) + 0.5) / (n + 1))
		ss += q * q
	}
	wantSD := math.Sqrt(ss / (n + 1))
	mu, sd := stat.MeanStdDev(xs, nil)
	se := wantSD / math.Sqrt(m)
	if math.Abs(mu) > 4*se || math.Abs(sd-wantSD) > 0.05 {
		t.Errorf("scores of fresh skewed values: mean %v sd %v, want 0 (+-%.3f) and %.3f", mu, sd, 4*se, wantSD)
	}
}

func sortFloat64s(s []float64) {
	for i := 1; i < len(s); i++ {
		for j := i; j > 0 && s[j] < s[j-1]; j-- {
			s[j], s[j-1] = s[j-1], s[j]
		}
	}
}

// TestTToNormal checks the t-to-normal map against gonum's exact Student's
// t CDF and normal quantile: the z it returns must have the same tail
// probability as t. Tolerances: 0.01 in z at nu = 30 (the switch-over),
// 0.003 from nu = 48, measured over |z| <= 6.
func TestTToNormal(t *testing.T) {
	for _, c := range []struct{ nu, tol float64 }{{2, 1e-6}, {9, 1e-6}, {29, 1e-6}, {30, 0.01}, {48, 0.003}, {148, 0.003}, {1000, 0.003}} {
		st := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: c.nu}
		worst := 0.0
		for x := -40.0; x <= 40; x += 0.01 {
			var want float64
			if x > 0 {
				want = -distuv.UnitNormal.Quantile(st.Survival(x))
			} else {
				want = distuv.UnitNormal.Quantile(st.CDF(x))
			}
			if math.Abs(want) > 6 {
				continue
			}
			worst = math.Max(worst, math.Abs(tToNormal(x, c.nu)-want))
		}
		if worst > c.tol {
			t.Errorf("nu %v: largest error in z %.4g, want at most %g", c.nu, worst, c.tol)
		}
	}
}

// TestSelfStartRunLength: with only 5 reference frames, a two-sided CUSUM
// (k = 1/2, h = 4) on self-start scores must have the in-control ARL of a
// chart whose parameters are known: about 168 from the Brook-Evans chain
// (Brook & Evans 1972; Montgomery's table gives ~168, from memory), within
// 6% over 3000 runs. The same chart on scores from the frozen mean/sd of
// the same 5 frames is far off (its run lengths depend on the estimation
// error of each run), which the test also shows, so a self-start model
// that stopped learning would fail.
func TestSelfStartRunLength(t *testing.T) {
	const ref, runs, h, k = 5, 3000, 4.0, 0.5
	want := twoSided(brookEvansARL(h, k, 0, 400), brookEvansARL(h, k, 0, 400))
	rng := rand.New(rand.NewPCG(3, 4))
	idx := []int32{0}
	raw, z, miss := make([]float32, 1), make([]float32, 1), make([]bool, 1)
	arl := func(kind ModelKind) (mean, median float64) {
		rl := make([]float64, runs)
		for r := range rl {
			lr, err := NewLearner(1, ref, ModelOptions{Kind: kind, ScaleFloor: 1e-6})
			if err != nil {
				t.Fatal(err)
			}
			for range ref {
				if err := lr.Add([]float32{float32(100 + 7*rng.NormFloat64())}); err != nil {
					t.Fatal(err)
				}
			}
			md, err := lr.Model()
			if err != nil {
				t.Fatal(err)
			}
			var up, dn float64
			for n := 1; n <= 100000; n++ {
				raw[0] = float32(100 + 7*rng.NormFloat64())
				md.Standardize(z, miss, idx, raw)
				up = math.Max(0, up+float64(z[0])-k)
				dn = math.Max(0, dn-float64(z[0])-k)
				if up >= h || dn >= h {
					rl[r] = float64(n)
					break
				}
				md.Learn(idx, raw, miss)
			}
		}
		sortFloat64s(rl)
		return stat.Mean(rl, nil), rl[runs/2]
	}
	ss, ssMed := arl(SelfStart)
	within(t, "self-start ARL0 (5 reference frames)", ss, want, 0.06)
	fixed, fixedMed := arl(MeanSD)
	t.Logf("median run length: self-start %.0f, frozen mean/sd %.0f (known parameters: about 0.69 x ARL0 = %.0f for a geometric run length)", ssMed, fixedMed, 0.69*want)
	if math.Abs(fixed-want) < 0.3*want && math.Abs(fixedMed-ssMed) < 0.3*ssMed {
		t.Errorf("frozen 5-frame mean/sd gives ARL0 %.0f, median %.0f: expected far from %.0f", fixed, fixedMed, want)
	}
}
