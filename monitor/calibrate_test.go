package monitor

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"
)

// expPaths builds paths whose G is i.i.d. Exponential(1) per frame, so that
// RL(h) is geometric with p = exp(-h) and ARL0(h) = exp(h) exactly: log
// ARL0 is linear in h with slope 1 (the geometric-tail model, exactly).
func expPaths(n, horizon int, seed uint64) []pathRecord {
	rng := rand.New(rand.NewPCG(seed, 5))
	out := make([]pathRecord, n)
	for i := range out {
		best := math.Inf(-1)
		for t := 1; t <= horizon; t++ {
			g := rng.ExpFloat64()
			if g > best {
				best = g
				out[i].at = append(out[i].at, int32(t))
				out[i].g = append(out[i].g, g)
			}
		}
		out[i].frames = horizon
	}
	return out
}

func TestEstimateLimitDirect(t *testing.T) {
	paths := expPaths(400, 2000, 1)
	est, err := estimateLimit(paths, 100, 2000)
	if err != nil {
		t.Fatal(err)
	}
	// ARL0(h) = exp(h): h = ln 100 = 4.605; 400 paths give about 5% in ARL0,
	// 0.05 in h.
	if est.extrapolated || math.Abs(est.limit-math.Log(100)) > 0.15 {
		t.Errorf("direct limit %.3f (extrapolated %v), want ln 100 = 4.605 ± 0.15", est.limit, est.extrapolated)
	}
	if math.Abs(est.se/est.arl-0.05) > 0.02 {
		t.Errorf("relative s.e. %.3f, want about 1/sqrt(400) = 0.05", est.se/est.arl)
	}
}

// TestEstimateLimitCensoredDirect: a horizon of twice the target leaves
// about 14% of geometric run lengths censored; the limit must still come
// from the censored direct estimate (exact for geometric run lengths), not
// from the tail fit. ARL0(h) = exp(h), so h = ln 1000.
func TestEstimateLimitCensoredDirect(t *testing.T) {
	paths := expPaths(600, 2000, 3)
	est, err := estimateLimit(paths, 1000, 2000)
	if err != nil {
		t.Fatal(err)
	}
	// 600 paths, ~520 alarms: about 4.4% in ARL0, 0.044 in h.
	if est.extrapolated || math.Abs(est.limit-math.Log(1000)) > 0.15 {
		t.Errorf("limit %.3f (extrapolated %v, %s), want direct ln 1000 = 6.908 ± 0.15", est.limit, est.extrapolated, est.note)
	}
}

func TestEstimateLimitExtrapolated(t *testing.T) {
	paths := expPaths(200, 2000, 2)
	est, err := estimateLimit(paths, 1e5, 2000)
	if err != nil {
		t.Fatal(err)
	}
	want := math.Log(1e5)
	if !est.extrapolated {
		t.Fatalf("target 1e5 with a 2000-frame horizon was not extrapolated: %+v", est)
	}
	if math.Abs(est.limit-want) > 0.35 {
		t.Errorf("extrapolated limit %.3f, want ln 1e5 = %.3f ± 0.35", est.limit, want)
	}
	if !strings.Contains(est.note, "extrapolated") || !(est.se > 0) {
		t.Errorf("note %q, s.e. %v: want the extrapolation stated with an uncertainty", est.note, est.se)
	}
	// The stated uncertainty must cover the actual error in ARL0 at 3 s.e.
	trueARL := math.Exp(est.limit)
	if math.Abs(math.Log(trueARL/1e5)) > 3*math.Log1p(est.se/est.arl)+0.05 {
		t.Errorf("ARL0 at the extrapolated limit is %.3g, target 1e5, stated s.e. %.3g", trueARL, est.se)
	}
}

func smallCfg(p Policy) Config {
	return Config{Width: 16, Height: 16, Budget: 8, TopR: 4, Policy: p}
}

// TestCalibrateHonestSmall: fresh verification paths at the calibrated
// limit give the target ARL0 (16 x 16 grid, 3% budget, target 200).
func TestCalibrateHonestSmall(t *testing.T) {
	for _, p := range append(slices.Clone(Policies), Oracle) {
		t.Run(string(p), func(t *testing.T) {
			cfg := smallCfg(p)
			if p == Oracle {
				cfg.Oracle = Disk(16, 16, 8, 8, 2)
				cfg.Budget, cfg.Compensation = len(cfg.Oracle), 1e-12
			}
			cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfg, TargetARL0: 200,
				Paths: 120, Verify: 240, Burnin: 300, Seed: 3})
			if err != nil {
				t.Fatal(err)
			}
			if cal.Extrapolated || cal.Model != "normal" || cal.Burnin != 300 {
				t.Errorf("calibration %+v: want direct, normal model, burn-in 300", cal)
			}
			// Both estimates carry about 9% and 6.5% s.e.; 3 combined s.e.
			se := math.Hypot(cal.ARL0SE, cal.VerifiedSE)
			if math.Abs(cal.VerifiedARL0-200) > 3*se {
				t.Errorf("verified ARL0 %.0f ± %.0f at h = %.3f, target 200", cal.VerifiedARL0, cal.VerifiedSE, cal.Limit)
			}
			t.Logf("%s: h = %.3f, ARL0 %.0f ± %.0f, verified %.0f ± %.0f", p, cal.Limit, cal.ARL0, cal.ARL0SE, cal.VerifiedARL0, cal.VerifiedSE)
		})
	}
}

// TestCalibrateDeterministic: per-path seeds make the result independent of
// the number of goroutines.
func TestCalibrateDeterministic(t *testing.T) {
	spec := CalibrationSpec{Config: smallCfg(Random), TargetARL0: 50, Paths: 24, Verify: 8, Burnin: 100, Seed: 9}
	run := func(procs int) Calibration {
		old := runtime.GOMAXPROCS(procs)
		defer runtime.GOMAXPROCS(old)
		cal, err := Calibrate(context.Background(), spec)
		if err != nil {
			t.Fatal(err)
		}
		return cal
	}
	a, b := run(1), run(2)
	if a.Limit != b.Limit || a.VerifiedARL0 != b.VerifiedARL0 {
		t.Errorf("1 goroutine: h = %v, verified %v; 2: h = %v, verified %v", a.Limit, a.VerifiedARL0, b.Limit, b.VerifiedARL0)
	}
	spec.Seed++
	c, err := Calibrate(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	if c.Limit == a.Limit {
		t.Errorf("another seed gave the same limit %v", c.Limit)
	}
}

func TestCalibrateCancel(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	spec := CalibrationSpec{Config: Config{Width: 256, Height: 256, Budget: 2000, TopR: 10}, TargetARL0: 1e6, Paths: 100}
	var calls int
	spec.Progress = func(done, total int) { calls++ }
	go func() { time.Sleep(200 * time.Millisecond); cancel() }()
	start := time.Now()
	_, err := Calibrate(ctx, spec)
	if !errors.Is(err, context.Canceled) {
		t.Errorf("error %v, want context.Canceled", err)
	}
	if d := time.Since(start); d > 1200*time.Millisecond {
		t.Errorf("cancelled calibration returned after %s, want within a second of the cancel", d)
	}
}

func TestCalibrateProgressAndBootstrap(t *testing.T) {
	rng := rand.New(rand.NewPCG(4, 4))
	frames := make([][]float32, 200)
	for j := range frames {
		frames[j] = make([]float32, 256)
		for i := range frames[j] {
			frames[j][i] = float32(rng.NormFloat64())
		}
		frames[j][j] = float32(math.NaN()) // missing pixels are skipped
	}
	var last, total, calls int
	cal, err := Calibrate(context.Background(), CalibrationSpec{Config: smallCfg(Adaptive), TargetARL0: 100, Paths: 40, Verify: 20,
		Burnin: 200, Bootstrap: frames, Seed: 5,
		Progress: func(d, tot int) {
			if d < last {
				t.Errorf("progress went back from %d to %d", last, d)
			}
			last, total = d, tot
			calls++
		}})
	if err != nil {
		t.Fatal(err)
	}
	if cal.Model != "bootstrap" {
		t.Errorf("model %q, want bootstrap", cal.Model)
	}
	if last != 60 || total != 60 || calls != 60 {
		t.Errorf("progress ended at %d/%d after %d calls, want 60/60 after 60", last, total, calls)
	}
	if !(cal.Limit > 0) {
		t.Errorf("limit %v", cal.Limit)
	}
}

func TestCalibrateErrors(t *testing.T) {
	good := CalibrationSpec{Config: smallCfg(Adaptive), TargetARL0: 100, Paths: 4}
	cases := map[string]func(s *CalibrationSpec){
		"ErrTarget":      func(s *CalibrationSpec) { s.TargetARL0 = 0.5 },
		"ErrTargetNaN":   func(s *CalibrationSpec) { s.TargetARL0 = math.NaN() },
		"ErrBudget":      func(s *CalibrationSpec) { s.Config.Budget = 1000 },
		"ErrTopR":        func(s *CalibrationSpec) { s.Config.TopR = 0 },
		"ErrBootstrap":   func(s *CalibrationSpec) { s.Bootstrap = [][]float32{make([]float32, 3)} },
		"ErrNoBootstrap": func(s *CalibrationSpec) { s.Bootstrap = [][]float32{} },
		"ErrHorizon":     func(s *CalibrationSpec) { s.Horizon = -1 },
	}
	for name, mod := range cases {
		t.Run(name, func(t *testing.T) {
			s := good
			mod(&s)
			_, err := Calibrate(context.Background(), s)
			if err == nil || !strings.HasPrefix(err.Error(), "monitor:") {
				t.Errorf("error %v, want a monitor: error", err)
			}
		})
	}
	if _, err := Verify(context.Background(), VerifySpec{Config: smallCfg(Adaptive), Limit: -1}); err == nil {
		t.Error("Verify with a negative limit: no error")
	}
}

func TestSteadyBurnin(t *testing.T) {
	// 128 x 128 at 3%: adaptive uses the 1000-frame floor; random settles
	// more slowly (measured: the mean of G still rises until about 2500).
	a := SteadyBurnin(Config{Width: 128, Height: 128, Budget: 492, TopR: 10, Policy: Adaptive})
	r := SteadyBurnin(Config{Width: 128, Height: 128, Budget: 492, TopR: 10, Policy: Random})
	f := SteadyBurnin(Config{Width: 128, Height: 128, Budget: 16384, TopR: 10, Policy: Full})
	if a != 1000 || r < 2500 || r > 5000 || f != 200 {
		t.Errorf("burn-in adaptive %d, random %d, full %d; want 1000, 2500..5000, 200", a, r, f)
	}
}

// longTests reports whether the expensive checks were asked for
// (SPARSEWATCH_LONG=1); they take minutes on two cores.
func longTests(t *testing.T) {
	if os.Getenv("SPARSEWATCH_LONG") == "" || testing.Short() {
		t.Skip("set SPARSEWATCH_LONG=1 for the 128x128 calibration checks")
	}
}

// TestCalibrateHonest128 is the calibration honesty check of issue 2:
// 128 x 128, 3% budget, r = 10, target 1000, every policy (oracle on a
// radius-4 disk). The limit comes from Paths in-control paths after the
// default burn-in; it is then verified on as many fresh paths after twice
// that burn-in, which also shows the limit holds in the steady state (a
// statistic still drifting up after the default burn-in would alarm sooner
// after the longer one). Both estimates are Monte Carlo: with 1000 paths
// each carries about 3.2% s.e. (the run length is close to geometric, so
// s.e. ~ ARL0/sqrt(alarms)), 4.5% combined, so 10% is over 2 combined s.e.
// With the default 200 paths the calibration alone carries about 7% and a
// 10% check fails often by chance; that, not a bias, was what earlier
// 300-path runs showed (full +18%, random +11%, oracle -8%, each within
// 1.5 combined s.e.). SPARSEWATCH_HONEST_PATHS overrides the path count.
//
// Measured (seed 21/22, 1000 + 1000 paths; ARL0 on fresh paths after twice
// the burn-in, ± 1 s.e.): adaptive h = 67.88, 1044 ± 33; thompson 68.04,
// 961 ± 31; spatial 70.29, 951 ± 30; random 125.18, 981 ± 36; stride
// 123.58, 989 ± 38; oracle 40.50, 972 ± 31; full 99.19, 1095 ± 33 (that limit came from the
// downward tail extrapolation since fixed in estimateLimit; not rerun).
// About 56 minutes on two shared cores, full (54 minutes) run beside the rest.
func TestCalibrateHonest128(t *testing.T) {
	longTests(t)
	paths := 1000
	if v := os.Getenv("SPARSEWATCH_HONEST_PATHS"); v != "" {
		n, err := strconv.Atoi(v)
		if err != nil || n < 50 {
			t.Fatalf("SPARSEWATCH_HONEST_PATHS=%q: want a path count >= 50", v)
		}
		paths = n
	}
	for _, p := range append(append([]Policy{}, Policies...), Oracle) {
		t.Run(string(p), func(t *testing.T) {
			cfg := Config{Width: 128, Height: 128, Budget: 492, TopR: 10, Policy: p}
			if p == Full {
				cfg.Budget = 16384
			}
			if p == Oracle {
				cfg.Oracle = Disk(128, 128, 64, 64, 4)
				cfg.Budget, cfg.Compensation = len(cfg.Oracle), 1e-12
			}
			cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfg, TargetARL0: 1000, Paths: paths, Verify: -1, Seed: 21})
			if err != nil {
				t.Fatal(err)
			}
			v, err := Verify(context.Background(), VerifySpec{Config: cfg, Limit: cal.Limit, Paths: paths, Burnin: 2 * cal.Burnin, Seed: 22})
			if err != nil {
				t.Fatal(err)
			}
			t.Logf("%s: h = %.3f (burn-in %d), calibration ARL0 %.0f ± %.0f; fresh paths after a %d-frame burn-in: ARL0 %.0f ± %.0f (%d of %d alarmed)",
				p, cal.Limit, cal.Burnin, cal.ARL0, cal.ARL0SE, 2*cal.Burnin, v.ARL0, v.SE, v.Alarms, v.Paths)
			if math.Abs(v.ARL0-1000) > 100 {
				t.Errorf("steady-state ARL0 %.0f ± %.0f at h = %.3f, want 1000 within 10%%", v.ARL0, v.SE, cal.Limit)
			}
		})
	}
}

// TestTailExtrapolation128: at 128 x 128 the tail-extrapolated limit for
// ARL0 = 1e4 gives, by direct simulation at that limit, 1e4 within 15%.
func TestTailExtrapolation128(t *testing.T) {
	longTests(t)
	cfg := Config{Width: 128, Height: 128, Budget: 492, TopR: 10, Policy: Adaptive}
	cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfg, TargetARL0: 1e4, Paths: 200, Verify: 1, Horizon: 1500, Seed: 31})
	if err != nil {
		t.Fatal(err)
	}
	if !cal.Extrapolated {
		t.Fatalf("not extrapolated: %+v", cal)
	}
	v, err := Verify(context.Background(), VerifySpec{Config: cfg, Limit: cal.Limit, Paths: 300, Seed: 32})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("extrapolated h = %.3f (%s); direct ARL0 there %.0f ± %.0f", cal.Limit, cal.Note, v.ARL0, v.SE)
	if math.Abs(v.ARL0-1e4) > 1500 {
		t.Errorf("direct ARL0 %.0f ± %.0f at the extrapolated limit, want 1e4 within 15%%", v.ARL0, v.SE)
	}
}

// TestBootstrapPoolOfNormalFrames: a bootstrap of a small pool of exact
// N(0,1) frames must give about the limit of the normal model itself. Drawn
// without the cyclic shift each stream sees only its own few values and the
// top-r sum seeks out the streams whose values happen to be extreme, which
// raised the limit far above the normal one (fill's doc has the figures).
func TestBootstrapPoolOfNormalFrames(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 8))
	pool := make([][]float32, 30)
	for j := range pool {
		pool[j] = make([]float32, 256)
		for i := range pool[j] {
			pool[j][i] = float32(rng.NormFloat64())
		}
	}
	cfg := Config{Width: 16, Height: 16, Budget: 8, TopR: 4, Shift: 2, Policy: Adaptive}
	spec := CalibrationSpec{Config: cfg, TargetARL0: 200, Paths: 200, Verify: -1, Burnin: 300, Block: 1, Seed: 3}
	normal, err := Calibrate(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	spec.Bootstrap = pool
	boot, err := Calibrate(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("normal h %.3f, bootstrap of %d normal frames h %.3f", normal.Limit, len(pool), boot.Limit)
	// Tolerance: common practice, about three times the two limits'
	// Monte Carlo spread at 200 paths.
	if d := boot.Limit - normal.Limit; math.Abs(d) > 0.6 {
		t.Errorf("bootstrap limit %.3f is %.3f from the normal limit %.3f, want within 0.6", boot.Limit, d, normal.Limit)
	}
}

// TestBootstrapBlocks: frames come in runs of Block consecutive pool
// frames, each run moved by one cyclic shift of the grid.
func TestBootstrapBlocks(t *testing.T) {
	const gw, gh, n = 5, 4, 40
	pool := make([][]float32, n)
	for j := range pool {
		pool[j] = make([]float32, gw*gh)
		for i := range pool[j] {
			pool[j][i] = float32(j*1000 + i) // frame and stream, readable back
		}
	}
	r := &simRun{boot: pool, gw: gw, gh: gh, block: 7}
	idx := make([]int32, gw*gh)
	for i := range idx {
		idx[i] = int32(i)
	}
	var b pathBuffers
	rng := rand.New(rand.NewPCG(1, 2))
	prevFrame, prevShift := -1, -1
	for t0 := 0; t0 < 70; t0++ {
		z, _ := b.fill(idx, rng, r)
		j := int(z[0]) / 1000
		// Stream 0 reads grid cell (dx, dy); every other stream must read
		// its own cell moved by the same shift, wrapping at the edges.
		s0 := int(z[0]) % 1000
		dx, dy := s0%gw, s0/gw
		for i, v := range z {
			x, y := (i%gw+dx)%gw, (i/gw+dy)%gh
			if int(v)/1000 != j || int(v)%1000 != y*gw+x {
				t.Fatalf("frame %d stream %d read %v, want frame %d cell %d", t0, i, v, j, y*gw+x)
			}
		}
		if t0%7 != 0 && (j != prevFrame+1 || s0 != prevShift) {
			t.Fatalf("frame %d: pool frame %d shift %d inside a block after %d shift %d", t0, j, s0, prevFrame, prevShift)
		}
		prevFrame, prevShift = j, s0
	}
}
