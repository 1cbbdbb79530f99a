package review

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"
)

// TestSelfStartPoolIsNormal: self-starting scores of i.i.d. normal values,
// each scored against the values before it, are themselves i.i.d. N(0,1)
// whatever the stream's mean and scale (Hawkins 1987, The Statistician 36;
// Quesenberry 1991, Journal of Quality Technology 23, "Q charts"). The
// pool must show mean 0, variance 1 and no correlation between successive
// frames, and a missing raw value must stay missing.
func TestSelfStartPoolIsNormal(t *testing.T) {
	const m, n = 4000, 40
	rng := rand.New(rand.NewPCG(11, 12))
	loc, scale := make([]float64, m), make([]float64, m)
	for i := range loc {
		loc[i], scale[i] = 1000*rng.Float64(), 0.5+20*rng.Float64()
	}
	raw := make([][]float32, n)
	for j := range raw {
		raw[j] = make([]float32, m)
		for i := range raw[j] {
			raw[j][i] = float32(loc[i] + scale[i]*rng.NormFloat64())
		}
	}
	raw[n-1][7] = float32(math.NaN())
	pool, err := selfStartPool(raw)
	if err != nil {
		t.Fatal(err)
	}
	if len(pool) != n-10 {
		t.Fatalf("pool has %d frames, want %d (the first 10 start the model)", len(pool), n-10)
	}
	if !math.IsNaN(float64(pool[len(pool)-1][7])) {
		t.Errorf("missing raw value scored %v, want NaN", pool[len(pool)-1][7])
	}
	var s1, s2, lag float64
	var cnt, nlag int
	for j, f := range pool {
		for i, v := range f {
			x := float64(v)
			if math.IsNaN(x) {
				continue
			}
			s1 += x
			s2 += x * x
			cnt++
			if j > 0 && !math.IsNaN(float64(pool[j-1][i])) {
				lag += x * float64(pool[j-1][i])
				nlag++
			}
		}
	}
	mean, vr := s1/float64(cnt), s2/float64(cnt)
	r := lag / float64(nlag)
	// Four standard errors of each estimate under i.i.d. N(0,1):
	// 1/sqrt(N) for the mean and the lag product, sqrt(2/N) for the variance.
	se := 1 / math.Sqrt(float64(cnt))
	t.Logf("%d scores: mean %.4f, variance %.4f, lag-1 product %.4f (SE %.4f)", cnt, mean, vr, r, se)
	if math.Abs(mean) > 4*se || math.Abs(vr-1) > 4*math.Sqrt2*se || math.Abs(r) > 4*se {
		t.Errorf("scores are not N(0,1) i.i.d.: mean %.4f, variance %.4f, lag-1 %.4f (SE %.4f)", mean, vr, r, se)
	}
}

// TestSelfStartPoolTooFew: too few frames for the self-start model is the
// named error.
func TestSelfStartPoolTooFew(t *testing.T) {
	raw := [][]float32{{1, 2}, {2, 3}, {3, 1}, {1, 1}}
	if _, err := selfStartPool(raw); !errors.Is(err, ErrTooFewReference) {
		t.Errorf("error %v, want ErrTooFewReference", err)
	}
}
