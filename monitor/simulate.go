package monitor

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"sync"
	"sync/atomic"
)

// Scenario is a simulated change for measuring detection delay: standard
// normal in-control noise on a Width x Height grid, then from frame Burnin
// on, every stream of a disk of the given radius (centre drawn at random
// per run, disk inside the grid when it fits) shifts by Shift.
type Scenario struct {
	Width, Height int
	Radius        float64 // disk radius in streams (a disk of radius 4 holds 49)
	Shift         float64 // true shift in noise units, > 0
	Burnin        int     // in-control frames before the change (0 = the largest SteadyBurnin of the configs)

	// Quiet is how many frames just before the change must be free of
	// alarms for a run to count (0 = the whole burn-in, as METHODS.md
	// section 7 defines ADD). A shorter window keeps the conditioning of
	// policies with long burn-ins (random, stride) equal to that of the
	// others: an alarm earlier in the burn-in has died down by the change.
	Quiet    int
	Runs     int // runs per policy (default 200)
	MaxDelay int // frames after the change before a run counts as missed (default 20000)
	Seed     uint64
}

// DelayResult is the detection delay of one policy in a Scenario.
//
// Delay is counted in post-change frames up to and including the alarm
// frame: the last in-control frame is Burnin-1, so an alarm on the first
// changed frame is a delay of 1. ADD = mean delay over runs with no false
// alarm in the Quiet frames before the change (METHODS.md section 7);
// missed runs count as MaxDelay.
type DelayResult struct {
	Policy      Policy
	Limit       float64
	ADD, ADDSE  float64
	Runs        int // runs counted in ADD
	FalseAlarms int // runs that alarmed in the quiet window before the change (left out of ADD)
	Missed      int // counted runs with no alarm within MaxDelay
}

func (s Scenario) withDefaults() Scenario {
	if s.Runs == 0 {
		s.Runs = 200
	}
	if s.MaxDelay == 0 {
		s.MaxDelay = 20000
	}
	return s
}

func (s Scenario) validate() error {
	switch {
	case s.Width <= 0 || s.Height <= 0:
		return fmt.Errorf("monitor: scenario grid %dx%d is empty", s.Width, s.Height)
	case !(s.Radius >= 0) || math.IsInf(s.Radius, 0):
		return fmt.Errorf("monitor: scenario radius %v must be a finite number >= 0", s.Radius)
	case !(s.Shift > 0) || math.IsInf(s.Shift, 0):
		return fmt.Errorf("monitor: scenario shift %v must be a finite number > 0", s.Shift)
	case s.Burnin < 0 || s.Runs < 0 || s.MaxDelay < 0 || s.Quiet < 0:
		return errors.New("monitor: scenario burn-in, quiet window, runs and max delay must be >= 0")
	}
	return nil
}

// Disk returns the streams within radius r of (cx, cy), ascending.
func Disk(width, height int, cx, cy int, r float64) []int32 {
	var out []int32
	ri := int(math.Floor(r))
	for y := max(0, cy-ri); y <= min(height-1, cy+ri); y++ {
		for x := max(0, cx-ri); x <= min(width-1, cx+ri); x++ {
			dx, dy := float64(x-cx), float64(y-cy)
			if dx*dx+dy*dy <= r*r {
				out = append(out, int32(y*width+x))
			}
		}
	}
	return out
}

// changeFor returns the changed streams of run k: a disk whose centre is
// drawn uniformly among the positions that keep it inside the grid (any
// position when it cannot fit). Every policy sees the same disk in run k.
func (s Scenario) changeFor(k int) []int32 {
	ri := int(math.Floor(s.Radius))
	h := mix64(s.Seed ^ mix64(uint64(k)^0x6a09e667f3bcc909))
	pick := func(n int, h uint64) int {
		lo, hi := ri, n-1-ri
		if lo > hi {
			lo, hi = 0, n-1
		}
		return lo + int(h%uint64(hi-lo+1))
	}
	cx := pick(s.Width, h)
	cy := pick(s.Height, mix64(h))
	return Disk(s.Width, s.Height, cx, cy, s.Radius)
}

// noiseValue is the in-control value of stream i at frame t of run k: a
// standard normal computed from a hash of (seed, run, frame, stream), so
// that every policy reads the same value wherever it looks (common random
// numbers) while only the streams read are ever computed. The uniform is
// mapped through the normal quantile Phi^-1(u) = sqrt2 erfinv(2u - 1)
// (math.Erfinv implements Wichura 1988, Applied Statistics 37, AS 241).
func noiseValue(runKey uint64, t, i int) float32 {
	h := mix64(runKey ^ (uint64(t)<<32 | uint64(uint32(i))))
	u := (float64(h>>11) + 0.5) * (1.0 / (1 << 53))
	return float32(math.Sqrt2 * math.Erfinv(2*u-1))
}

// Simulate runs every configuration in cfgs (each with its calibrated
// Limit > 0) through sc.Runs runs of the scenario and reports the
// detection delay of each. Run k is the same for every configuration: the
// same disk and the same value at every (frame, stream) (common random
// numbers). A configuration with the Oracle policy gets the changed
// streams of each run as its Oracle set and reads exactly those.
func Simulate(ctx context.Context, sc Scenario, cfgs []Config, progress func(done, total int)) ([]DelayResult, error) {
	sc = sc.withDefaults()
	if err := sc.validate(); err != nil {
		return nil, err
	}
	for j := range cfgs {
		c := cfgs[j].Defaults()
		if c.Width != sc.Width || c.Height != sc.Height {
			return nil, fmt.Errorf("monitor: config %d grid %dx%d differs from the scenario's %dx%d", j, c.Width, c.Height, sc.Width, sc.Height)
		}
		if !(c.Limit > 0) {
			return nil, fmt.Errorf("monitor: config %d (%s) has no control limit; calibrate it first", j, c.Policy)
		}
		if c.Policy == Oracle {
			c.Oracle = sc.changeFor(0)
			c.Budget = len(c.Oracle)
		}
		if err := c.Validate(); err != nil {
			return nil, err
		}
	}
	if sc.Burnin == 0 {
		for _, c := range cfgs {
			if c.Policy == Oracle {
				c.Oracle = sc.changeFor(0)
				c.Budget = len(c.Oracle)
			}
			sc.Burnin = max(sc.Burnin, SteadyBurnin(c))
		}
	}
	n := len(cfgs) * sc.Runs
	delays := make([]int, n) // -1 false alarm; > MaxDelay missed
	prog := newProgress(progress, n)
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	workers := min(runtime.GOMAXPROCS(0), max(n, 1))
	var next atomic.Int64
	errs := make([]error, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var z []float32
			changed := make([]bool, sc.Width*sc.Height)
			for {
				task := int(next.Add(1)) - 1
				if task >= n {
					return
				}
				j, k := task/sc.Runs, task%sc.Runs
				d, err := sc.run(ctx, cfgs[j], k, changed, &z)
				if err != nil {
					errs[w] = err
					cancel()
					return
				}
				delays[task] = d
				prog.add(1)
			}
		}()
	}
	wg.Wait()
	for _, err := range errs {
		if err != nil && !errors.Is(err, context.Canceled) {
			return nil, err
		}
	}
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("monitor: simulation stopped: %w", err)
	}
	out := make([]DelayResult, len(cfgs))
	for j := range cfgs {
		c := cfgs[j].Defaults()
		r := DelayResult{Policy: c.Policy, Limit: c.Limit}
		var s1, s2 float64
		for _, d := range delays[j*sc.Runs : (j+1)*sc.Runs] {
			if d < 0 {
				r.FalseAlarms++
				continue
			}
			if d > sc.MaxDelay {
				r.Missed++
				d = sc.MaxDelay
			}
			r.Runs++
			s1 += float64(d)
			s2 += float64(d) * float64(d)
		}
		if r.Runs > 0 {
			nn := float64(r.Runs)
			r.ADD = s1 / nn
			if r.Runs > 1 {
				r.ADDSE = math.Sqrt(math.Max(s2-s1*s1/nn, 0) / (nn - 1) / nn)
			}
		} else {
			r.ADD, r.ADDSE = math.NaN(), math.NaN()
		}
		out[j] = r
	}
	return out, nil
}

// run simulates run k for one configuration and returns the delay, -1 for
// a false alarm, or MaxDelay+1 when the change was missed.
func (s Scenario) run(ctx context.Context, cfg Config, k int, changed []bool, zbuf *[]float32) (int, error) {
	disk := s.changeFor(k)
	if cfg.Policy == Oracle {
		cfg.Oracle = disk
		cfg.Budget = len(disk)
	}
	runKey := mix64(s.Seed ^ mix64(uint64(k)+0x3c6ef372fe94f82b))
	cfg.Seed = runKey
	eng, err := New(cfg)
	if err != nil {
		return 0, err
	}
	for _, i := range disk {
		changed[i] = true
	}
	defer func() {
		for _, i := range disk {
			changed[i] = false
		}
	}()
	h := eng.Limit()
	shift := float32(s.Shift)
	quietFrom := 0
	if s.Quiet > 0 {
		quietFrom = max(0, s.Burnin-s.Quiet)
	}
	done := ctx.Done()
	for t := 0; t < s.Burnin+s.MaxDelay; t++ {
		// Checked every frame: a large grid may take 100 ms a frame.
		select {
		case <-done:
			return 0, ctx.Err()
		default:
		}
		idx := eng.Next()
		if cap(*zbuf) < len(idx) {
			*zbuf = make([]float32, len(idx))
		}
		z := (*zbuf)[:len(idx)]
		after := t >= s.Burnin
		for j, i := range idx {
			v := noiseValue(runKey, t, int(i))
			if after && changed[i] {
				v += shift
			}
			z[j] = v
		}
		upd, err := eng.Step(z, nil)
		if err != nil {
			return 0, err
		}
		if upd.G >= h {
			if !after {
				if t < quietFrom {
					continue // an early alarm; it must have ended by the quiet window
				}
				return -1, nil
			}
			return t - s.Burnin + 1, nil
		}
	}
	return s.MaxDelay + 1, nil
}
