package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"strings"
	"sync"
	"time"

	"sparsewatch/monitor"
	"sparsewatch/server/plot"
)

// runPlan predicts the detection delay each sampling policy buys at each
// budget, every policy calibrated to the same in-control ARL0.
func runPlan(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "plan", "plan [--width W --height H --radius R --shift D --budget 1%,3%,10% --arl0 N --top-r R --compensation F --policies adaptive,random,... --runs N] [--json] [--plot FILE.svg]")
	width := fs.Int("width", 128, "grid width in streams")
	height := fs.Int("height", 128, "grid height in streams")
	radius := fs.Float64("radius", 4, "radius of the changed disk, in streams")
	shift := fs.Float64("shift", 1, "change size in noise units (also the design shift)")
	budgets := fs.String("budget", "3%", `budgets, comma-separated: "3%", "0.03" or a stream count "500"`)
	arl0 := fs.Float64("arl0", 1000, "target in-control ARL0 in frames")
	topR := fs.Int("top-r", 10, "local statistics summed into the global statistic")
	comp := fs.Float64("compensation", 0.25, "compensation as a fraction of its ceiling c_max = q d^2 / 2(m-q)")
	compAbs := fs.Float64("comp-abs", 0, "absolute compensation per unread frame (overrides --compensation)")
	policies := fs.String("policies", "adaptive,thompson,spatial,random,stride,full,oracle", "policies to compare (oracle: reads exactly the changed streams)")
	runs := fs.Int("runs", 200, "simulated changes per policy and budget")
	paths := fs.Int("paths", 200, "in-control paths per calibration (as many again verify it)")
	burnin := fs.Int("burnin", 0, "in-control frames before the change and before counting run lengths (0 = per-policy steady-state default)")
	seed := fs.Uint64("seed", 1, "random seed")
	asJSON := fs.Bool("json", false, "print the results as JSON")
	plotFile := fs.String("plot", "", "write an SVG plot of delay against budget to this file")
	if err := parse(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(env.Stderr, "plan: unexpected argument %q\n", fs.Arg(0))
		return errUsage
	}
	bs, err := parseBudgetList(*budgets)
	if err != nil {
		return err
	}
	pols, err := parsePolicyList(*policies)
	if err != nil {
		return err
	}
	spec := monitor.PlanSpec{Width: *width, Height: *height, Radius: *radius, Shift: *shift, Budgets: bs,
		Policies: pols, ARL0: *arl0, TopR: *topR, CompFraction: *comp, Compensation: *compAbs,
		Runs: *runs, Paths: *paths, Burnin: *burnin, Seed: *seed}
	prog := newProgressLine(env.Stderr, "plan")
	spec.Progress = prog.update
	start := time.Now()
	res, err := monitor.Plan(ctx, spec)
	prog.finish()
	if err != nil {
		return err
	}
	fmt.Fprintf(env.Stderr, "plan: done in %s\n", time.Since(start).Round(time.Second))
	if *plotFile != "" {
		if err := writePlanPlot(*plotFile, spec, res); err != nil {
			return err
		}
	}
	if *asJSON {
		return writePlanJSON(env.Stdout, res)
	}
	writePlanTable(env.Stdout, spec, res)
	return nil
}

// parseBudgetList reads "1%,3%,10%" (percent), "0.03" (fraction) or "500"
// (a stream count) into the values monitor.BudgetStreams takes.
func parseBudgetList(s string) ([]float64, error) {
	var out []float64
	for _, f := range strings.Split(s, ",") {
		f = strings.TrimSpace(f)
		if f == "" {
			continue
		}
		pct := strings.HasSuffix(f, "%")
		v, err := strconv.ParseFloat(strings.TrimSuffix(f, "%"), 64)
		if err != nil || !(v > 0) || math.IsInf(v, 0) {
			return nil, fmt.Errorf("budget %q: want a percentage like 3%%, a fraction like 0.03 or a stream count", f)
		}
		if pct {
			if v > 100 {
				return nil, fmt.Errorf("budget %q is above 100%%", f)
			}
			v /= 100
			if v == 1 {
				v = math.Nextafter(1, 0) // every stream
			}
		}
		out = append(out, v)
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("no budget given")
	}
	return out, nil
}

func parsePolicyList(s string) ([]monitor.Policy, error) {
	var out []monitor.Policy
	for _, f := range strings.Split(s, ",") {
		f = strings.TrimSpace(f)
		if f == "" {
			continue
		}
		p, err := monitor.ParsePolicy(f)
		if err != nil {
			return nil, err
		}
		out = append(out, p)
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("no policy given")
	}
	return out, nil
}

func writePlanTable(w io.Writer, spec monitor.PlanSpec, res []monitor.PlanResult) {
	m := spec.Width * spec.Height
	disk := monitor.Disk(spec.Width, spec.Height, spec.Width/2, spec.Height/2, spec.Radius)
	fmt.Fprintf(w, "%dx%d grid (%d streams), change: disk of radius %g (%d streams) shifted by %g; target ARL0 %g; top-r %d\n",
		spec.Width, spec.Height, m, spec.Radius, len(disk), spec.Shift, spec.ARL0, spec.TopR)
	fmt.Fprintf(w, "ADD: mean post-change frames up to the alarm over runs without a false alarm; ARL0 verified on fresh in-control paths\n\n")
	fmt.Fprintf(w, "%-8s %-9s %7s %9s %9s %16s %16s %8s\n", "budget", "policy", "q", "c", "limit", "ARL0 ± s.e.", "ADD ± s.e.", "runs")
	for _, r := range res {
		c := "-"
		if r.Policy != monitor.Full && r.Policy != monitor.Oracle {
			cfg := monitor.Config{Width: spec.Width, Height: spec.Height, Budget: r.Streams, Shift: spec.Shift,
				CompFraction: spec.CompFraction, Compensation: spec.Compensation}.Defaults()
			c = fmt.Sprintf("%.3g", cfg.Comp())
		}
		counted := spec.Runs
		if counted <= 0 {
			counted = 200
		}
		counted -= r.FalseAlarms
		runs := fmt.Sprintf("%d", counted)
		if r.Missed > 0 {
			runs += fmt.Sprintf(" (%d missed)", r.Missed)
		}
		fmt.Fprintf(w, "%-8s %-9s %7d %9s %9.3f %16s %16s %8s\n", fmt.Sprintf("%.3g%%", 100*r.Budget), r.Policy, r.Streams, c,
			r.Limit, fmt.Sprintf("%.0f ± %.0f", r.ARL0, r.ARL0SE), fmt.Sprintf("%.2f ± %.2f", r.ADD, r.ADDSE), runs)
	}
	for _, r := range res {
		if strings.HasPrefix(r.Note, "extrapolated") {
			fmt.Fprintf(w, "\nnote (%s at %.3g%%): %s\n", r.Policy, 100*r.Budget, r.Note)
		}
	}
}

type planJSON struct {
	Policy      string  `json:"policy"`
	Budget      float64 `json:"budget"`
	Streams     int     `json:"streams"`
	Limit       float64 `json:"limit"`
	ARL0        float64 `json:"arl0"`
	ARL0SE      float64 `json:"arl0_se"`
	ADD         float64 `json:"add"`
	ADDSE       float64 `json:"add_se"`
	FalseAlarms int     `json:"false_alarms"`
	Missed      int     `json:"missed"`
	Note        string  `json:"note,omitempty"`
}

// jsonNumber keeps JSON valid when a value is not finite (no alarm at all).
func jsonNumber(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return -1
	}
	return v
}

func writePlanJSON(w io.Writer, res []monitor.PlanResult) error {
	out := struct {
		Results []planJSON `json:"results"`
	}{Results: []planJSON{}}
	for _, r := range res {
		out.Results = append(out.Results, planJSON{Policy: string(r.Policy), Budget: r.Budget, Streams: r.Streams,
			Limit: r.Limit, ARL0: jsonNumber(r.ARL0), ARL0SE: jsonNumber(r.ARL0SE), ADD: jsonNumber(r.ADD), ADDSE: jsonNumber(r.ADDSE),
			FalseAlarms: r.FalseAlarms, Missed: r.Missed, Note: r.Note})
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}

func writePlanPlot(path string, spec monitor.PlanSpec, res []monitor.PlanResult) error {
	var series []plot.Series
	at := map[monitor.Policy]int{}
	for _, r := range res {
		k, ok := at[r.Policy]
		if !ok {
			k = len(series)
			at[r.Policy] = k
			series = append(series, plot.Series{Name: string(r.Policy)})
		}
		s := &series[k]
		s.X = append(s.X, 100*r.Budget)
		s.Y = append(s.Y, r.ADD)
		s.Err = append(s.Err, r.ADDSE)
	}
	chart := plot.Chart{
		Title:  fmt.Sprintf("Detection delay, %dx%d, disk radius %g, shift %g, ARL0 %g", spec.Width, spec.Height, spec.Radius, spec.Shift, spec.ARL0),
		XLabel: "budget (% of streams read per frame)", YLabel: "ADD (frames, ± 1 s.e.)",
		LogX: len(spec.Budgets) > 1, LogY: true, Series: series,
	}
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("plot: %w", err)
	}
	if err := chart.WriteSVG(f); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// progressLine prints "name: 42%" on one stderr line, at most a few times a
// second.
type progressLine struct {
	mu    sync.Mutex
	w     io.Writer
	name  string
	last  time.Time
	shown bool
}

func newProgressLine(w io.Writer, name string) *progressLine { return &progressLine{w: w, name: name} }

func (p *progressLine) update(done, total int) {
	p.mu.Lock()
	defer p.mu.Unlock()
	if total <= 0 || (time.Since(p.last) < 500*time.Millisecond && done < total) {
		return
	}
	p.last = time.Now()
	p.shown = true
	fmt.Fprintf(p.w, "\r%s: %3.0f%% (%d/%d)", p.name, 100*float64(done)/float64(total), done, total)
}

func (p *progressLine) finish() {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.shown {
		fmt.Fprintln(p.w)
	}
}
