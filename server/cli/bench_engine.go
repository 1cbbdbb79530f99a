package cli

import (
	"context"
	"fmt"
	"math/rand/v2"
	"time"

	"sparsewatch/monitor"
)

// benchEngine times the engine's per-frame work (Next + Step) at one or more
// budgets and, in the same run, one pass that reads and writes every
// stream's state: the memory-bandwidth floor of any method that touches all
// m streams per frame. The ratio is what to compare across machines.
func benchEngine(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "bench", "bench --engine [--width W --height H --budget 0.3%,3%,30% --policy P --top-r R --frames N]")
	fs.Bool("engine", true, "benchmark the engine (this mode)")
	width := fs.Int("width", 1024, "grid width in streams")
	height := fs.Int("height", 1024, "grid height in streams")
	budget := fs.String("budget", "3%", `budgets, comma-separated: "3%", "0.03" or a count`)
	policy := fs.String("policy", "adaptive", "sampling policy")
	topR := fs.Int("top-r", 10, "local statistics summed into the global statistic")
	frames := fs.Int("frames", 100, "timed frames per budget")
	warm := fs.Int("warmup", 0, "untimed frames first (0 = 3 sweeps m/q, at most 300)")
	seed := fs.Uint64("seed", 1, "random seed")
	if err := parse(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(env.Stderr, "bench: unexpected argument %q\n", fs.Arg(0))
		return errUsage
	}
	bs, err := parseBudgetList(*budget)
	if err != nil {
		return err
	}
	pol, err := monitor.ParsePolicy(*policy)
	if err != nil {
		return err
	}
	if pol == monitor.Oracle {
		return fmt.Errorf("the oracle policy exists in simulation only")
	}
	if *frames < 1 {
		return fmt.Errorf("frames %d must be at least 1", *frames)
	}
	m := *width * *height
	// A pool of standard normal values, drawn before timing; each frame
	// reads a different window of it.
	rng := rand.New(rand.NewPCG(*seed, 3))
	pool := make([]float32, m+4099)
	for i := range pool {
		pool[i] = float32(rng.NormFloat64())
	}
	w := env.Stdout
	fmt.Fprintf(w, "engine bench: %dx%d grid (%d streams), policy %s, top-r %d, %d timed frames per budget\n", *width, *height, m, pol, *topR, *frames)
	fmt.Fprintf(w, "%-8s %9s %14s %14s %8s\n", "budget", "q", "step/frame", "state pass", "ratio")
	for _, b := range bs {
		q, err := monitor.BudgetStreams(b, m)
		if err != nil {
			return err
		}
		eng, err := monitor.New(monitor.Config{Width: *width, Height: *height, Budget: q, TopR: *topR, Policy: pol, Seed: *seed})
		if err != nil {
			return err
		}
		nw := *warm
		if nw == 0 {
			nw = min(300, 3*((m+q-1)/q))
		}
		off := 0
		step := func() error {
			idx := eng.Next()
			off = (off + 4097) % (len(pool) - len(idx) + 1)
			_, err := eng.Step(pool[off:off+len(idx)], nil)
			return err
		}
		for range nw {
			if err := ctx.Err(); err != nil {
				return err
			}
			if err := step(); err != nil {
				return err
			}
		}
		// Interleave state passes with the timed frames so both see the
		// same machine load.
		var tStep, tPass time.Duration
		for range *frames {
			if err := ctx.Err(); err != nil {
				return err
			}
			t0 := time.Now()
			if err := step(); err != nil {
				return err
			}
			t1 := time.Now()
			eng.StatePass()
			tPass += time.Since(t1)
			tStep += t1.Sub(t0)
		}
		n := time.Duration(*frames)
		perStep, perPass := tStep/n, tPass/n
		fmt.Fprintf(w, "%-8s %9d %14s %14s %8.2f\n", fmt.Sprintf("%.3g%%", 100*float64(q)/float64(m)), q,
			perStep.Round(time.Microsecond), perPass.Round(time.Microsecond), float64(perStep)/float64(perPass))
	}
	fmt.Fprintf(w, "ratio = step time / state-pass time (one read and write of every stream's U, D, last update and rank key)\n")
	return nil
}
