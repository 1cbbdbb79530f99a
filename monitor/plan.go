package monitor

import (
	"context"
	"fmt"
	"math"
)

// PlanSpec asks what detection delay each sampling policy buys at each
// budget, every policy calibrated to the same in-control ARL0.
type PlanSpec struct {
	Width, Height int
	Radius        float64   // disk radius of the change, in streams
	Shift         float64   // change size in noise units; also the design shift d
	Budgets       []float64 // a fraction of the streams in (0,1), or a stream count >= 1
	Policies      []Policy  // Oracle allowed
	ARL0          float64   // target in-control ARL0 in frames
	TopR          int
	CompFraction  float64 // compensation as a fraction of c_max (default 0.25)
	Compensation  float64 // absolute compensation; > 0 overrides CompFraction
	Runs          int     // delay runs per policy and budget (default 200)
	Paths         int     // calibration paths (default 200)
	Burnin        int     // frames before the change and before counting run lengths (0 = SteadyBurnin per policy)
	Quiet         int     // alarm-free frames before the change for a run to count (0 = min(burn-in, 1000, ARL0), the same for every policy)
	Seed          uint64
	Progress      func(done, total int) // work units finished; calls are serialised
}

// PlanResult is one policy at one budget.
type PlanResult struct {
	Policy       Policy
	Budget       float64 // fraction of the streams read per frame
	Streams      int     // q
	Limit        float64
	ARL0, ARL0SE float64 // verified on fresh in-control paths at Limit
	ADD, ADDSE   float64
	FalseAlarms  int // delay runs that alarmed before the change (left out of ADD)
	Missed       int // delay runs with no alarm within the scenario's MaxDelay
	Note         string
}

// BudgetStreams turns a budget (a fraction below 1, or a whole stream count
// >= 1) into q for m streams, at least 1.
func BudgetStreams(b float64, m int) (int, error) {
	switch {
	case !(b > 0) || math.IsInf(b, 0):
		return 0, fmt.Errorf("monitor: budget %v must be a fraction in (0,1] or a count >= 1", b)
	case b < 1:
		return max(1, int(math.Round(b*float64(m)))), nil
	case b != math.Trunc(b):
		return 0, fmt.Errorf("monitor: budget %v is neither a fraction below 1 nor a whole count", b)
	case b > float64(m):
		return 0, fmt.Errorf("monitor: budget %v exceeds the %d streams", b, m)
	}
	return int(b), nil
}

// Plan calibrates every policy at every budget to spec.ARL0 (steady state,
// standard normal model), then measures its detection delay on the same
// simulated changes (Simulate). Full and Oracle do not depend on the budget
// and are computed once. Results are ordered by budget, then policy.
func Plan(ctx context.Context, spec PlanSpec) ([]PlanResult, error) {
	m := spec.Width * spec.Height
	if spec.Width <= 0 || spec.Height <= 0 {
		return nil, fmt.Errorf("monitor: plan grid %dx%d is empty", spec.Width, spec.Height)
	}
	if len(spec.Budgets) == 0 || len(spec.Policies) == 0 {
		return nil, fmt.Errorf("monitor: plan needs at least one budget and one policy")
	}
	runs, paths := spec.Runs, spec.Paths
	if runs <= 0 {
		runs = 200
	}
	if paths <= 0 {
		paths = 200
	}
	sc := Scenario{Width: spec.Width, Height: spec.Height, Radius: spec.Radius, Shift: spec.Shift,
		Burnin: spec.Burnin, Runs: runs, Seed: spec.Seed}.withDefaults()
	if err := sc.validate(); err != nil {
		return nil, err
	}
	disk := Disk(spec.Width, spec.Height, spec.Width/2, spec.Height/2, spec.Radius)
	if len(disk) == 0 {
		return nil, fmt.Errorf("monitor: plan radius %v selects no stream", spec.Radius)
	}

	type job struct {
		policy Policy
		budget float64
		q      int
		reuse  int // index of an earlier job with the same result, or -1
	}
	var jobs []job
	first := map[Policy]int{}
	for _, b := range spec.Budgets {
		q, err := BudgetStreams(b, m)
		if err != nil {
			return nil, err
		}
		for _, p := range spec.Policies {
			if _, err := ParsePolicy(string(p)); err != nil {
				return nil, err
			}
			j := job{policy: p, budget: float64(q) / float64(m), q: q, reuse: -1}
			if p == Full || p == Oracle {
				if k, ok := first[p]; ok {
					j.reuse = k
				} else {
					first[p] = len(jobs)
				}
			}
			jobs = append(jobs, j)
		}
	}
	perJob := 2*paths + runs
	total := 0
	for _, j := range jobs {
		if j.reuse < 0 {
			total += perJob
		}
	}
	var done int
	report := func(base int) func(int, int) {
		return func(d, _ int) {
			if spec.Progress != nil {
				spec.Progress(base+d, total)
			}
		}
	}

	out := make([]PlanResult, len(jobs))
	for n, j := range jobs {
		if j.reuse >= 0 {
			r := out[j.reuse]
			r.Budget, r.Streams = j.budget, j.q
			out[n] = r
			continue
		}
		cfg := Config{Width: spec.Width, Height: spec.Height, Budget: j.q, TopR: spec.TopR, Shift: spec.Shift,
			Policy: j.policy, CompFraction: spec.CompFraction, Compensation: spec.Compensation}
		switch j.policy {
		case Full:
			cfg.Budget = m
		case Oracle:
			// The oracle reads only the changed streams; the others stay
			// unread for good, so they get (next to) no compensation.
			cfg.Oracle, cfg.Budget = disk, len(disk)
			cfg.Compensation, cfg.CompFraction = 1e-12, 0
		}
		if cfg.TopR > cfg.Budget && j.policy == Oracle {
			cfg.TopR = cfg.Budget
		}
		cal, err := Calibrate(ctx, CalibrationSpec{Config: cfg, TargetARL0: spec.ARL0, Paths: paths,
			Burnin: spec.Burnin, Seed: spec.Seed ^ uint64(n+1)*0x9e3779b97f4a7c15, Progress: report(done)})
		if err != nil {
			return nil, fmt.Errorf("monitor: plan %s at budget %d: %w", j.policy, j.q, err)
		}
		done += 2 * paths
		cfg.Limit = cal.Limit
		sc.Burnin = cal.Burnin // the change comes in the same steady state
		if spec.Quiet == 0 {
			// One ARL0 (at most 1000 frames) of quiet: with ARL0 1000 about
			// 37% of runs count, whatever the policy's burn-in.
			sc.Quiet = min(sc.Burnin, 1000, int(math.Ceil(spec.ARL0)))
		} else {
			sc.Quiet = spec.Quiet
		}
		res, err := Simulate(ctx, sc, []Config{cfg}, report(done))
		if err != nil {
			return nil, fmt.Errorf("monitor: plan %s at budget %d: %w", j.policy, j.q, err)
		}
		done += runs
		d := res[0]
		out[n] = PlanResult{Policy: j.policy, Budget: j.budget, Streams: j.q, Limit: cal.Limit,
			ARL0: cal.VerifiedARL0, ARL0SE: cal.VerifiedSE, ADD: d.ADD, ADDSE: d.ADDSE,
			FalseAlarms: d.FalseAlarms, Missed: d.Missed, Note: cal.Note}
	}
	return out, nil
}
