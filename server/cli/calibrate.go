package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"time"

	"sparsewatch/monitor"
)

// runCalibrate prints the control limit for a target in-control ARL0, its
// check on fresh paths, and how the limit was found.
func runCalibrate(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "calibrate", "calibrate [--width W --height H | --reference DIR [--tile K --warmup N]] [--budget 3% --arl0 N --policy P --top-r R --shift D --compensation F] [--paths N] [--json]")
	width := fs.Int("width", 128, "grid width in streams")
	height := fs.Int("height", 128, "grid height in streams")
	budget := fs.String("budget", "3%", `streams read per frame: "3%", "0.03" or a count "500"`)
	arl0 := fs.Float64("arl0", 10000, "target in-control ARL0 in frames")
	policy := fs.String("policy", "adaptive", "sampling policy: adaptive|thompson|spatial|random|stride|full")
	topR := fs.Int("top-r", 10, "local statistics summed into the global statistic")
	shift := fs.Float64("shift", 1, "design shift d in noise units")
	comp := fs.Float64("compensation", 0.25, "compensation as a fraction of its ceiling c_max")
	compAbs := fs.Float64("comp-abs", 0, "absolute compensation (overrides --compensation)")
	paths := fs.Int("paths", 200, "in-control paths (as many again verify the limit)")
	verify := fs.Int("verify", 0, "fresh verification paths (0 = as many as --paths, -1 = skip)")
	burnin := fs.Int("burnin", 0, "frames before counting run lengths (0 = steady-state default, -1 = zero state)")
	horizon := fs.Int("horizon", 0, "frames counted per path at most (0 = automatic; beyond it the limit is extrapolated)")
	work := fs.Float64("work", 0, "cap on stream reads spent per stage when choosing the horizon (0 = default 4e9)")
	chains := fs.Int("chains", 0, "run the paths as windows of this many long simulations, each burnt in once (faster on large grids, about 10%% off in ARL0; 0 = every path fresh)")
	gap := fs.Int("gap", 0, "uncounted frames after an in-control alarm before the next counted window (0 = burn-in/4)")
	zeroCheck := fs.Bool("zero-state-check", false, "also calibrate from zero state and measure that limit's steady-state ARL0")
	seed := fs.Uint64("seed", 1, "random seed")
	asJSON := fs.Bool("json", false, "print the result as JSON")
	refDir := fs.String("reference", "", "bootstrap from this folder (or .zip) of in-control frames instead of the normal model; the grid is the frames' size / --tile")
	tile := fs.Int("tile", 1, "with --reference: k x k tile means as streams")
	warmup := fs.Int("warmup", 50, "with --reference: reference frames to read")
	if err := parse(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(env.Stderr, "calibrate: unexpected argument %q\n", fs.Arg(0))
		return errUsage
	}
	bs, err := parseBudgetList(*budget)
	if err != nil {
		return err
	}
	if len(bs) != 1 {
		return fmt.Errorf("calibrate takes one budget, got %d", len(bs))
	}
	pol, err := monitor.ParsePolicy(*policy)
	if err != nil {
		return err
	}
	if pol == monitor.Oracle {
		return fmt.Errorf("the oracle policy exists in simulation only (see plan)")
	}
	var boot [][]float32
	if *refDir != "" {
		if boot, *width, *height, err = referenceBootstrap(*refDir, *tile, *warmup); err != nil {
			return err
		}
		fmt.Fprintf(env.Stderr, "calibrate: bootstrap from %d reference frames of %s (%d x %d streams)\n", len(boot), *refDir, *width, *height)
	}
	m := *width * *height
	q, err := monitor.BudgetStreams(bs[0], m)
	if err != nil {
		return err
	}
	cfg := monitor.Config{Width: *width, Height: *height, Budget: q, TopR: *topR, Shift: *shift, Policy: pol,
		CompFraction: *comp, Compensation: *compAbs}
	spec := monitor.CalibrationSpec{Config: cfg, TargetARL0: *arl0, Paths: *paths, Verify: *verify, Burnin: *burnin,
		Horizon: *horizon, WorkCap: *work, Chains: *chains, Gap: *gap, Seed: *seed, Bootstrap: boot}
	prog := newProgressLine(env.Stderr, "calibrate")
	spec.Progress = prog.update
	start := time.Now()
	cal, err := monitor.Calibrate(ctx, spec)
	prog.finish()
	if err != nil {
		return err
	}
	took := time.Since(start)

	var zs *zeroStateCheck
	if *zeroCheck {
		zspec := spec
		zspec.Burnin = -1
		zp := newProgressLine(env.Stderr, "calibrate (zero state)")
		zspec.Progress = zp.update
		zcal, err := monitor.Calibrate(ctx, zspec)
		zp.finish()
		if err != nil {
			return err
		}
		vp := newProgressLine(env.Stderr, "verify zero-state limit in steady state")
		v, err := monitor.Verify(ctx, monitor.VerifySpec{Config: cfg, Limit: zcal.Limit, Paths: spec.Paths,
			Burnin: 0, Horizon: 20 * int(*arl0), Chains: *chains, Gap: *gap, Seed: *seed ^ 0xabcdef, Progress: vp.update})
		vp.finish()
		if err != nil {
			return err
		}
		zs = &zeroStateCheck{Limit: zcal.Limit, ZeroStateARL0: jsonNumber(zcal.VerifiedARL0), ZeroStateSE: jsonNumber(zcal.VerifiedSE),
			SteadyARL0: jsonNumber(v.ARL0), SteadySE: jsonNumber(v.SE)}
	}

	if *asJSON {
		out := map[string]any{
			"width": *width, "height": *height, "streams": m, "budget": q, "policy": string(pol), "top_r": *topR,
			"shift": *shift, "compensation": cal.Compensation, "target_arl0": *arl0,
			"limit": cal.Limit, "arl0": jsonNumber(cal.ARL0), "arl0_se": jsonNumber(cal.ARL0SE),
			"verified_arl0": jsonNumber(cal.VerifiedARL0), "verified_se": jsonNumber(cal.VerifiedSE), "verified_alarms": cal.VerifiedEvents,
			"model": cal.Model, "extrapolated": cal.Extrapolated, "note": cal.Note,
			"paths": cal.Paths, "burnin": cal.Burnin, "horizon": cal.Horizon, "seconds": took.Seconds(),
		}
		if zs != nil {
			out["zero_state"] = zs
		}
		enc := json.NewEncoder(env.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(out)
	}
	w := env.Stdout
	fmt.Fprintf(w, "%dx%d grid (%d streams), %s reading %d a frame (%.3g%%), top-r %d, d %g, c %.4g; %s model\n",
		*width, *height, m, pol, q, 100*float64(q)/float64(m), *topR, *shift, cal.Compensation, cal.Model)
	fmt.Fprintf(w, "target ARL0 %g frames (steady state after a %d-frame burn-in)\n", *arl0, cal.Burnin)
	fmt.Fprintf(w, "control limit h = %.4f\n", cal.Limit)
	fmt.Fprintf(w, "estimated ARL0 at h: %.0f ± %.0f (1 s.e., %d paths)\n", cal.ARL0, cal.ARL0SE, cal.Paths)
	fmt.Fprintf(w, "verified ARL0 at h on fresh paths: %.0f ± %.0f (%d alarms)\n", cal.VerifiedARL0, cal.VerifiedSE, cal.VerifiedEvents)
	fmt.Fprintf(w, "how: %s\n", cal.Note)
	if zs != nil {
		fmt.Fprintf(w, "zero-state calibration: h = %.4f gives ARL0 %.0f ± %.0f from zero state but %.0f ± %.0f in steady state (%.2fx the target)\n",
			zs.Limit, zs.ZeroStateARL0, zs.ZeroStateSE, zs.SteadyARL0, zs.SteadySE, zs.SteadyARL0 / *arl0)
	}
	fmt.Fprintf(w, "took %s\n", took.Round(100*time.Millisecond))
	return nil
}

type zeroStateCheck struct {
	Limit         float64 `json:"limit"`
	ZeroStateARL0 float64 `json:"zero_state_arl0"`
	ZeroStateSE   float64 `json:"zero_state_se"`
	SteadyARL0    float64 `json:"steady_arl0"`
	SteadySE      float64 `json:"steady_se"`
}
