package monitor

import (
	"context"
	"math"
	"sort"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func TestDisk(t *testing.T) {
	if n := len(Disk(128, 128, 64, 64, 4)); n != 49 {
		t.Errorf("disk of radius 4 holds %d streams, want 49 (lattice points with x^2+y^2 <= 16)", n)
	}
	if d := Disk(10, 10, 3, 2, 0); len(d) != 1 || d[0] != 23 {
		t.Errorf("radius 0 disk %v, want [23]", d)
	}
	if n := len(Disk(10, 10, 0, 0, 1)); n != 3 {
		t.Errorf("corner disk of radius 1 holds %d streams, want 3 (clipped)", n)
	}
	d := Disk(20, 20, 10, 10, 3)
	if !sort.SliceIsSorted(d, func(a, b int) bool { return d[a] < d[b] }) {
		t.Errorf("disk not ascending: %v", d)
	}
}

// TestNoiseValueNormal: the hashed common-random-number values are standard
// normal: Kolmogorov-Smirnov distance against gonum's normal CDF below the
// 1% critical value 1.63/sqrt(n) (Smirnov 1948, Annals of Math. Stat. 19),
// and no correlation between neighbouring streams or frames.
func TestNoiseValueNormal(t *testing.T) {
	const n = 20000
	xs := make([]float64, n)
	var sxy, sxt float64
	for k := range xs {
		xs[k] = float64(noiseValue(77, k/100, k%100))
		sxy += xs[k] * float64(noiseValue(77, k/100, k%100+1))
		sxt += xs[k] * float64(noiseValue(77, k/100+1, k%100))
	}
	sort.Float64s(xs)
	var d float64
	for k, x := range xs {
		f := distuv.UnitNormal.CDF(x)
		d = math.Max(d, math.Max(math.Abs(f-float64(k)/n), math.Abs(f-float64(k+1)/n)))
	}
	if crit := 1.63 / math.Sqrt(n); d > crit {
		t.Errorf("KS distance %.4f above the 1%% critical value %.4f", d, crit)
	}
	// Correlations have s.d. 1/sqrt(n) = 0.007; 4 s.d.
	if math.Abs(sxy/n) > 0.03 || math.Abs(sxt/n) > 0.03 {
		t.Errorf("neighbour correlations %.4f (streams), %.4f (frames)", sxy/n, sxt/n)
	}
	if noiseValue(1, 2, 3) != noiseValue(1, 2, 3) || noiseValue(1, 2, 3) == noiseValue(2, 2, 3) {
		t.Error("noise values must depend on (run, frame, stream) only")
	}
}

func TestSimulateSureDetection(t *testing.T) {
	// A shift of 12 noise units on a disk raises each read stream's CUSUM by
	// about 11.5 at the first changed frame: full observation with h = 8
	// and r = 1 alarms then, every run (delay 1).
	sc := Scenario{Width: 8, Height: 8, Radius: 1, Shift: 12, Burnin: 50, Runs: 20, Seed: 1}
	cfg := Config{Width: 8, Height: 8, Budget: 64, TopR: 1, Policy: Full, Limit: 8}
	res, err := Simulate(context.Background(), sc, []Config{cfg}, nil)
	if err != nil {
		t.Fatal(err)
	}
	r := res[0]
	if r.ADD != 1 || r.ADDSE != 0 || r.Runs+r.FalseAlarms != 20 || r.Missed != 0 {
		t.Errorf("sure detection: %+v, want ADD 1 with s.e. 0 over 20 runs", r)
	}
}

func TestSimulateFalseAlarmsAndOrder(t *testing.T) {
	sc := Scenario{Width: 12, Height: 12, Radius: 1.5, Shift: 1.5, Burnin: 100, Runs: 40, Seed: 2}
	cfgs := []Config{
		{Width: 12, Height: 12, Budget: 144, TopR: 1, Policy: Full, Limit: 0.5}, // alarms at once
		{Width: 12, Height: 12, Budget: 9, TopR: 5, Policy: Oracle, Oracle: Disk(12, 12, 6, 6, 1.5), Compensation: 1e-12},
		{Width: 12, Height: 12, Budget: 9, TopR: 5, Policy: Random},
	}
	for _, j := range []int{1, 2} {
		cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfgs[j], TargetARL0: 300, Paths: 30, Verify: 1, Burnin: 100, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		cfgs[j].Limit = cal.Limit
	}
	res, err := Simulate(context.Background(), sc, cfgs, nil)
	if err != nil {
		t.Fatal(err)
	}
	if res[0].FalseAlarms != 40 || res[0].Runs != 0 || !math.IsNaN(res[0].ADD) {
		t.Errorf("limit 0.5: %+v, want every run a false alarm and no ADD", res[0])
	}
	if res[1].Runs == 0 || res[2].Runs == 0 || !(res[1].ADD < res[2].ADD) {
		t.Errorf("oracle %+v should detect faster than random %+v reading as many streams", res[1], res[2])
	}
	again, err := Simulate(context.Background(), sc, cfgs[1:2], nil)
	if err != nil {
		t.Fatal(err)
	}
	if again[0] != res[1] {
		t.Errorf("same scenario, different result: %+v vs %+v", again[0], res[1])
	}
}

func TestSimulateErrors(t *testing.T) {
	sc := Scenario{Width: 8, Height: 8, Radius: 1, Shift: 1, Runs: 2}
	cfg := Config{Width: 8, Height: 8, Budget: 4, TopR: 2, Limit: 5}
	for name, tc := range map[string]struct {
		sc  Scenario
		cfg Config
	}{
		"ErrNoLimit": {sc, Config{Width: 8, Height: 8, Budget: 4, TopR: 2}},
		"ErrGrid":    {sc, Config{Width: 4, Height: 8, Budget: 4, TopR: 2, Limit: 5}},
		"ErrShift":   {Scenario{Width: 8, Height: 8, Radius: 1, Shift: 0}, cfg},
		"ErrRadius":  {Scenario{Width: 8, Height: 8, Radius: math.NaN(), Shift: 1}, cfg},
	} {
		t.Run(name, func(t *testing.T) {
			if _, err := Simulate(context.Background(), tc.sc, []Config{tc.cfg}, nil); err == nil {
				t.Error("no error")
			}
		})
	}
}

// TestSimulateQuietWindow: only alarms in the quiet window before the
// change exclude a run, so a short window excludes fewer runs.
func TestSimulateQuietWindow(t *testing.T) {
	cfg := Config{Width: 12, Height: 12, Budget: 9, TopR: 5, Policy: Adaptive}
	cal, err := Calibrate(context.Background(), CalibrationSpec{Config: cfg, TargetARL0: 100, Paths: 30, Verify: -1, Burnin: 200, Seed: 6})
	if err != nil {
		t.Fatal(err)
	}
	cfg.Limit = cal.Limit
	sc := Scenario{Width: 12, Height: 12, Radius: 1.5, Shift: 1.5, Burnin: 200, Runs: 60, Seed: 7}
	all, err := Simulate(context.Background(), sc, []Config{cfg}, nil)
	if err != nil {
		t.Fatal(err)
	}
	sc.Quiet = 50
	quiet, err := Simulate(context.Background(), sc, []Config{cfg}, nil)
	if err != nil {
		t.Fatal(err)
	}
	// ARL0 ~ 100: about 86% of runs alarm within 200 frames, 40% within 50.
	if !(quiet[0].FalseAlarms < all[0].FalseAlarms) || quiet[0].Runs+quiet[0].FalseAlarms != 60 {
		t.Errorf("false alarms with a 50-frame quiet window %d, with the whole burn-in %d", quiet[0].FalseAlarms, all[0].FalseAlarms)
	}
}
