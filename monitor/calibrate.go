package monitor

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sort"
	"sync"
	"sync/atomic"
)

// CalibrationSpec asks for the control limit h that gives a target
// in-control average run length (ARL0) for one engine configuration.
type CalibrationSpec struct {
	Config     Config  // grid, budget, policy, top-r, shift, compensation; Limit is ignored
	TargetARL0 float64 // frames to a false alarm, > 1

	// Paths is the number of simulated in-control paths (default 200); the
	// verification uses as many fresh ones (Verify overrides; < 0 skips it).
	Paths  int
	Verify int

	// Burnin is the number of frames run before run lengths are counted, so
	// that the limit holds in the steady state the monitor really runs in
	// (METHODS.md section 5). 0 selects SteadyBurnin(Config); negative means
	// no burn-in: a zero-state calibration.
	Burnin int

	// Horizon caps the frames counted per path after the burn-in. 0 selects
	// 4 x TargetARL0, lowered (not below 2000) so that paths x horizon x q stays
	// within WorkCap stream reads; when the target is out of the horizon's
	// reach the limit is found by tail extrapolation (Calibration.Note).
	Horizon int
	WorkCap float64 // default 4e9 stream reads for the counted frames

	// Chains > 0 makes the paths windows of that many long simulations,
	// each run through the burn-in once; after a window that ended in an
	// alarm, Gap uncounted frames (default max(50, burn-in/4)) pass before
	// the next window. It saves the burn-ins on large grids but is not
	// exact: windows then start in the stationary state or after an
	// excursion, fresh paths after a burn-in. Measured at 128 x 128 (oracle
	// and adaptive, 3%, target 1000), limits from 4 chains gave about 10%
	// more ARL0 on fresh paths. 0 (default) runs every path on its own
	// fresh engine. The chain count, not the number of cores, fixes the
	// result.
	Chains int
	Gap    int

	// Bootstrap, when not nil, holds standardised in-control frames, each of
	// length m (NaN = missing); every simulated frame is one of them drawn
	// with replacement and moved by a random cyclic shift of the grid (see
	// pathBuffers.fill for why). Nil simulates independent standard normal
	// values.
	Bootstrap [][]float32
	// Block is the number of consecutive pool frames drawn at a time, in
	// pool order and with one shift (the moving block bootstrap: Kunsch
	// 1989, Annals of Statistics 17), so that a slow drift in the pool
	// stays as persistent as it was; at most a third of the pool. 0 selects
	// DefaultBlock, 1 draws frames one at a time.
	Block int
	// FixedStreams keeps every pool stream on its own grid position (no
	// shift): for pools whose per-stream differences are the point, such as
	// the lasting error of an estimated model.
	FixedStreams bool

	Seed     uint64
	Progress func(done, total int) // paths finished; calls are serialised
}

// Calibration is the result of Calibrate.
type Calibration struct {
	Limit        float64 // h
	ARL0, ARL0SE float64 // estimated ARL0 at Limit and its standard error
	Model        string  // "normal" or "bootstrap"
	Compensation float64 // absolute compensation c the engine used
	Extrapolated bool    // Limit comes from tail extrapolation
	Note         string  // how the limit was found, with any extrapolation and its uncertainty
	Paths        int     // calibration paths used
	Burnin       int     // frames before counting
	Horizon      int     // frames counted per path at most

	// VerifiedARL0 is measured on fresh paths at Limit; VerifiedEvents is
	// the number of those paths that alarmed within the horizon.
	VerifiedARL0, VerifiedSE float64
	VerifiedEvents           int
}

// Calibrate simulates in-control paths of the engine with no limit and
// picks h so that the steady-state ARL0 matches spec.TargetARL0.
//
// The sampling layout never depends on h, so one in-control path of G
// gives the run length for every h at once: the first frame at which G
// reaches h (first-passage property; METHODS.md section 5). Run lengths cut
// by the horizon are treated as censored; the ARL0 estimate at h is total
// counted frames over alarms (the geometric maximum-likelihood estimate,
// exact mean when nothing is censored). Targets beyond the horizon's reach
// come from a straight-line fit of log hazard against h at lower limits:
// run lengths of CUSUM-type schemes are close to geometric for large h
// with log ARL0 close to linear in h (Siegmund 1985, Sequential Analysis,
// ch. 2; the geometric tail of CUSUM run lengths: Brook & Evans 1972,
// Biometrika 59). Work runs on every core, one engine per chain, each chain
// with its own seed, so results do not depend on scheduling.
func Calibrate(ctx context.Context, spec CalibrationSpec) (Calibration, error) {
	var cal Calibration
	cfg, run, err := spec.prepare()
	if err != nil {
		return cal, err
	}
	cal.Model, cal.Burnin, cal.Horizon = run.model(), run.burnin, run.horizon
	if cfg.Policy != Full {
		cal.Compensation = cfg.Comp()
	}
	target := spec.TargetARL0
	nPaths := spec.Paths
	if nPaths <= 0 {
		nPaths = 200
	}
	nVerify := spec.Verify
	switch {
	case nVerify == 0:
		nVerify = nPaths
	case nVerify < 0:
		nVerify = 0
	}
	pilot := max(16, nPaths/4)
	if pilot > nPaths {
		pilot = nPaths
	}
	prog := newProgress(spec.Progress, nPaths+nVerify)

	// Pilot windows run to the horizon; they locate the limit roughly and
	// set the level at which the later windows may stop early. The same
	// chains then go on with the remaining windows.
	chains := make([]chain, run.chainCount(nPaths))
	paths := make([]pathRecord, nPaths)
	if err := run.many(ctx, cfg, chains, paths[:pilot], math.Inf(1), spec.Seed, 1, prog); err != nil {
		return cal, err
	}
	stop := math.Inf(1)
	if est, err := estimateLimit(paths[:pilot], target, run.horizon); err == nil && !est.extrapolated {
		// Stop at the level of ARL0 ~ 3 x target, which lies inside the
		// horizon (4 x target) whenever the direct estimate applies.
		if h, ok := levelForARL(paths[:pilot], 3*target); ok {
			stop = math.Max(h, est.limit*1.05)
		}
	}
	mainChains, stage := chains, 1
	if run.chains >= nPaths {
		// Fresh paths: the main windows get engines of their own too.
		mainChains, stage = make([]chain, run.chainCount(nPaths-pilot)), 4
	}
	if err := run.many(ctx, cfg, mainChains, paths[pilot:], stop, spec.Seed, stage, prog); err != nil {
		return cal, err
	}
	chains, mainChains = nil, nil // let the engines go
	est, err := estimateLimit(paths, target, run.horizon)
	if err != nil {
		return cal, err
	}
	cal.Limit, cal.ARL0, cal.ARL0SE = est.limit, est.arl, est.se
	cal.Extrapolated, cal.Note, cal.Paths = est.extrapolated, est.note, nPaths

	// Fresh chains (new seeds, own burn-in) at the chosen limit.
	if nVerify == 0 {
		cal.VerifiedARL0, cal.VerifiedSE = math.NaN(), math.NaN()
		cal.Note += "; not verified on fresh paths (Verify < 0)"
		return cal, nil
	}
	ver := make([]pathRecord, nVerify)
	if err := run.many(ctx, cfg, make([]chain, run.chainCount(nVerify)), ver, cal.Limit, spec.Seed, 2, prog); err != nil {
		return cal, err
	}
	a, n := arlAt(ver, cal.Limit)
	cal.VerifiedARL0, cal.VerifiedSE, cal.VerifiedEvents = a.arl, a.se, n
	if n < nVerify {
		cal.Note += fmt.Sprintf("; verification: %d of %d fresh paths alarmed within %d frames, ARL0 from total frames / alarms", n, nVerify, run.horizon)
	}
	return cal, nil
}

// VerifySpec asks for the in-control ARL0 of one configuration at a given
// limit, measured on simulated paths after a burn-in.
type VerifySpec struct {
	Config    Config
	Limit     float64
	Paths     int // default 200
	Burnin    int // as in CalibrationSpec
	Horizon   int // frames counted per path at most; 0 = until the alarm
	Chains    int // as in CalibrationSpec
	Gap       int
	Bootstrap [][]float32
	// Block and FixedStreams as in CalibrationSpec.
	Block        int
	FixedStreams bool
	Seed         uint64
	Progress     func(done, total int)
}

// Verification is an ARL0 measured at a fixed limit.
type Verification struct {
	ARL0, SE float64
	Alarms   int // paths that alarmed within the horizon
	Paths    int
}

// Verify measures the in-control ARL0 at spec.Limit (for example to show how
// a zero-state limit behaves in steady state).
func Verify(ctx context.Context, spec VerifySpec) (Verification, error) {
	if !(spec.Limit > 0) || math.IsInf(spec.Limit, 0) {
		return Verification{}, fmt.Errorf("monitor: verify limit %v must be a finite number > 0", spec.Limit)
	}
	cs := CalibrationSpec{Config: spec.Config, TargetARL0: 2, Burnin: spec.Burnin, Horizon: spec.Horizon,
		Chains: spec.Chains, Gap: spec.Gap, Bootstrap: spec.Bootstrap, Block: spec.Block, FixedStreams: spec.FixedStreams,
		Seed: spec.Seed}
	if cs.Horizon == 0 {
		cs.Horizon = 1 << 30
	}
	cfg, run, err := cs.prepare()
	if err != nil {
		return Verification{}, err
	}
	n := spec.Paths
	if n <= 0 {
		n = 200
	}
	ver := make([]pathRecord, n)
	if err := run.many(ctx, cfg, make([]chain, run.chainCount(n)), ver, spec.Limit, spec.Seed, 3, newProgress(spec.Progress, n)); err != nil {
		return Verification{}, err
	}
	a, k := arlAt(ver, spec.Limit)
	return Verification{ARL0: a.arl, SE: a.se, Alarms: k, Paths: n}, nil
}

// prepare validates the spec and fills in defaults.
func (s CalibrationSpec) prepare() (Config, *simRun, error) {
	cfg := s.Config.Defaults()
	cfg.Limit = 0
	if err := cfg.Validate(); err != nil {
		return cfg, nil, err
	}
	if !(s.TargetARL0 > 1) || math.IsInf(s.TargetARL0, 0) {
		return cfg, nil, fmt.Errorf("monitor: target ARL0 %v must be a finite number > 1", s.TargetARL0)
	}
	if s.Paths < 0 {
		return cfg, nil, errors.New("monitor: paths must be >= 0")
	}
	if s.Horizon < 0 {
		return cfg, nil, fmt.Errorf("monitor: horizon %d must be >= 0", s.Horizon)
	}
	m := cfg.Streams()
	for j, f := range s.Bootstrap {
		if len(f) != m {
			return cfg, nil, fmt.Errorf("monitor: bootstrap frame %d has %d values, want %d (one per stream)", j, len(f), m)
		}
	}
	if s.Bootstrap != nil && len(s.Bootstrap) == 0 {
		return cfg, nil, errors.New("monitor: bootstrap needs at least one frame")
	}
	run := &simRun{boot: s.Bootstrap, chains: s.Chains, gw: cfg.Width, gh: cfg.Height, block: s.Block, fixed: s.FixedStreams}
	if run.block <= 0 {
		run.block = DefaultBlock
	}
	run.block = max(1, min(run.block, len(s.Bootstrap)/3))
	if run.chains <= 0 {
		run.chains = math.MaxInt32 // every path its own chain
	}
	q := readsPerFrame(cfg)
	switch {
	case s.Burnin < 0:
		run.burnin = 0
	case s.Burnin > 0:
		run.burnin = s.Burnin
	default:
		run.burnin = SteadyBurnin(cfg)
	}
	run.gap = s.Gap
	if run.gap <= 0 {
		run.gap = max(50, run.burnin/4)
	}
	run.horizon = s.Horizon
	if run.horizon == 0 {
		paths := s.Paths
		if paths <= 0 {
			paths = 200
		}
		work := s.WorkCap
		if work <= 0 {
			work = 4e9
		}
		h := math.Min(4*s.TargetARL0, work/float64(paths)/float64(q))
		run.horizon = int(math.Max(math.Min(h, 1<<30), 2000))
	}
	return cfg, run, nil
}

// readsPerFrame is the number of streams the policy reads each frame.
func readsPerFrame(cfg Config) int {
	switch cfg.Policy {
	case Full:
		return cfg.Streams()
	case Oracle:
		return min(cfg.Budget, len(cfg.Oracle))
	}
	return cfg.Budget
}

// SteadyBurnin returns the default number of in-control frames after which
// a configuration's statistics are in their steady state (METHODS.md
// section 5): max(1000, 5 sweeps m/q). Policies that read streams without
// looking at their statistics (random, stride) settle more slowly: a
// stream then is a reflected random walk read a share p = q/m of the
// frames, with drift delta = p d^2/2 - c (1-p) per frame and variance p d^2,
// whose top statistics among m streams reach their stationary level of
// about ln(m) p d^2 / (2 delta) in about that level over delta frames (our
// estimate; three times it is used). When every stream (or, for the oracle,
// the same streams) is read every frame, each CUSUM settles within a few
// dozen frames and 200 frames are used.
func SteadyBurnin(cfg Config) int {
	cfg = cfg.Defaults()
	m, q := cfg.Streams(), readsPerFrame(cfg)
	if q >= m || cfg.Policy == Oracle {
		return 200
	}
	b := max(1000, 5*((m+q-1)/q))
	if cfg.Policy == Random || cfg.Policy == Stride {
		p, d2 := float64(q)/float64(m), cfg.Shift*cfg.Shift
		delta := p*d2/2 - cfg.Comp()*(1-p)
		if delta > 0 {
			t := 3 * math.Log(float64(m)) * p * d2 / (2 * delta * delta)
			b = max(b, int(math.Min(math.Ceil(t), 1e6)))
		}
	}
	return b
}

// DefaultBlock is the default bootstrap block length in frames: long
// against the few dozen frames over which a CUSUM near its limit builds up.
const DefaultBlock = 25

// simRun simulates in-control paths of one configuration.
type simRun struct {
	burnin, horizon int
	gap             int         // uncounted frames after a window that reached the stop level
	chains          int         // chains per stage
	boot            [][]float32 // bootstrap frames; nil = standard normal
	gw, gh          int         // grid, for the bootstrap's cyclic shifts
	block           int         // bootstrap block length
	fixed           bool        // no cyclic shift of the bootstrap frames
}

func (r *simRun) model() string {
	if r.boot != nil {
		return "bootstrap"
	}
	return "normal"
}

// pathRecord keeps the records of G along one path: the counted frames
// (1-based after the burn-in) at which G exceeded every earlier value, and
// those values. RL(h) is the first record frame with value >= h; a path
// with no such record is censored at frames.
type pathRecord struct {
	at     []int32
	g      []float64
	frames int
}

func (p *pathRecord) runLength(h float64) (int, bool) {
	k := sort.SearchFloat64s(p.g, h) // records are increasing
	if k < len(p.g) {
		return int(p.at[k]), true
	}
	return p.frames, false
}

// pathSeed derives a seed for path i of a stage by the splitmix64 mixer
// (Steele, Lea & Flood 2014, OOPSLA, "Fast splittable pseudorandom number
// generators").
func pathSeed(seed uint64, stage, i int) uint64 {
	return mix64(seed ^ mix64(uint64(stage)<<40^uint64(i)+0x9e3779b97f4a7c15))
}

func mix64(z uint64) uint64 {
	z += 0x9e3779b97f4a7c15
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// chain is one in-control simulation carried across windows: an engine
// run through its burn-in once, then a sequence of counted windows, each a
// path in the sense of pathRecord. After a window that ended with G at the
// stop level, gap uncounted frames let the excursion die down before the
// next window starts; a window cut by the horizon is followed at once (the
// monitor was in its steady state throughout). Zero-state runs reset the
// engine before every window instead.
type chain struct {
	eng     *Engine
	rng     *rand.Rand
	buf     pathBuffers
	needGap bool
}

// chainCount is the number of chains per stage: fixed, so that results
// depend on the seed only, never on the number of cores.
func (r *simRun) chainCount(windows int) int { return max(1, min(r.chains, windows)) }

// many fills out with windows of the given chains (chain c makes windows
// c, c+C, c+2C, ...), running the chains in parallel, one goroutine per
// chain at a time. chains[c].eng == nil starts chain c from a fresh engine
// seeded from (seed, stage, c). Each window stops when G reaches stop or
// after the horizon.
func (r *simRun) many(ctx context.Context, cfg Config, chains []chain, out []pathRecord, stop float64, seed uint64, stage int, prog *progress) error {
	if len(out) == 0 {
		return nil
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	nc := min(len(chains), len(out)) // chains beyond the windows would idle
	workers := min(runtime.GOMAXPROCS(0), nc)
	var next atomic.Int64
	errs := make([]error, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				c := int(next.Add(1)) - 1
				if c >= nc {
					return
				}
				ch := &chains[c]
				if ch.eng == nil {
					if err := r.start(ctx, cfg, ch, pathSeed(seed, stage, c)); err != nil {
						errs[w] = err
						cancel()
						return
					}
				}
				for k := c; k < len(out); k += nc {
					if err := r.window(ctx, ch, &out[k], stop); err != nil {
						errs[w] = err
						cancel()
						return
					}
					prog.add(1)
				}
			}
		}()
	}
	wg.Wait()
	for _, err := range errs {
		if err != nil && !errors.Is(err, context.Canceled) {
			return err
		}
	}
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("monitor: calibration stopped: %w", err)
	}
	return nil
}

type pathBuffers struct {
	z       []float32
	missing []bool
	// bootstrap block: next pool frame, frames left in the block, shift
	next, left, dx, dy int
}

// start makes the chain's engine and runs its burn-in.
func (r *simRun) start(ctx context.Context, cfg Config, ch *chain, seed uint64) error {
	cfg.Seed = mix64(seed ^ 0x5851f42d4c957f2d)
	eng, err := New(cfg)
	if err != nil {
		return err
	}
	ch.eng = eng
	ch.rng = rand.New(rand.NewPCG(seed, 0xda3e39cb94b95bdb))
	_, err = r.frames(ctx, ch, r.burnin, nil, math.Inf(1))
	return err
}

// window counts one path on the chain: frames until G >= stop or the
// horizon, keeping the records of G.
func (r *simRun) window(ctx context.Context, ch *chain, rec *pathRecord, stop float64) error {
	switch {
	case r.burnin == 0:
		ch.eng.Reset()
	case ch.needGap:
		if _, err := r.frames(ctx, ch, r.gap, nil, math.Inf(1)); err != nil {
			return err
		}
	}
	rec.at, rec.g, rec.frames = rec.at[:0], rec.g[:0], 0
	hit, err := r.frames(ctx, ch, r.horizon, rec, stop)
	ch.needGap = hit
	return err
}

// frames steps the chain up to n frames. With rec, it records the running
// maximum of G and stops early, reporting true, once G reaches stop.
func (r *simRun) frames(ctx context.Context, ch *chain, n int, rec *pathRecord, stop float64) (bool, error) {
	done := ctx.Done()
	best := math.Inf(-1)
	for t := 1; t <= n; t++ {
		// Checked every frame: a large grid may take 100 ms a frame.
		select {
		case <-done:
			return false, ctx.Err()
		default:
		}
		idx := ch.eng.Next()
		z, missing := ch.buf.fill(idx, ch.rng, r)
		upd, err := ch.eng.Step(z, missing)
		if err != nil {
			return false, err
		}
		if rec == nil {
			continue
		}
		rec.frames = t
		if upd.G > best {
			best = upd.G
			rec.at = append(rec.at, int32(t))
			rec.g = append(rec.g, best)
			if best >= stop {
				return true, nil
			}
		}
	}
	return false, nil
}

// fill draws the values of the streams idx: independent standard normals
// (only the q read values are drawn), or the values of the next bootstrap
// frame of the current block, shifted cyclically by the block's random
// (dx, dy) on the grid.
//
// The shift is there because a pool of n frames gives each stream only n
// values of its own, and the top-r sum over m streams seeks out the streams
// whose few values happen to be extreme: a pool of 150 frames of exact
// N(0,1) noise gave a limit of 59.5 where the exact normal model gives 51.5
// (80 x 60 streams, adaptive 3%, shift 2, target ARL0 200), so limits from
// the raw pool were far too conservative. Shifted, every stream draws from
// all n x m values while each drawn frame keeps its spatial correlation and
// its frame-wide offset (broken only along the wrap seam). What is lost is
// any difference between streams in the shape of their standardised noise,
// which n frames cannot estimate anyway.
func (b *pathBuffers) fill(idx []int32, rng *rand.Rand, r *simRun) ([]float32, []bool) {
	frames, gw, gh := r.boot, r.gw, r.gh
	if cap(b.z) < len(idx) {
		b.z = make([]float32, len(idx))
		b.missing = make([]bool, len(idx))
	}
	z := b.z[:len(idx)]
	if frames == nil {
		for k := range z {
			z[k] = float32(rng.NormFloat64())
		}
		return z, nil
	}
	if b.left == 0 {
		b.next, b.left = rng.IntN(len(frames)-r.block+1), r.block
		if !r.fixed {
			b.dx, b.dy = rng.IntN(gw), rng.IntN(gh)
		}
	}
	f, dx, dy := frames[b.next], b.dx, b.dy
	b.next++
	b.left--
	missing := b.missing[:len(idx)]
	any := false
	for k, i := range idx {
		x, y := int(i)%gw+dx, int(i)/gw+dy
		if x >= gw {
			x -= gw
		}
		if y >= gh {
			y -= gh
		}
		v := f[y*gw+x]
		if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
			z[k], missing[k], any = 0, true, true
			continue
		}
		z[k], missing[k] = v, false
	}
	if !any {
		return z, nil
	}
	return z, missing
}

// arlEstimate is an ARL0 estimate at one level.
type arlEstimate struct {
	arl, se float64
	events  int
	expo    float64
}

// arlAt estimates ARL0 at h from paths: total counted frames (each path up
// to its alarm or its end) over the number of alarms, the maximum
// likelihood estimate for geometric run lengths with censoring. With no
// censoring it is the sample mean and the standard error is the sample
// s.d. over sqrt(n); otherwise ARL0 / sqrt(alarms).
func arlAt(paths []pathRecord, h float64) (arlEstimate, int) {
	var e arlEstimate
	var sum, sum2 float64
	for i := range paths {
		n, ok := paths[i].runLength(h)
		x := float64(n)
		e.expo += x
		sum += x
		sum2 += x * x
		if ok {
			e.events++
		}
	}
	if e.events == 0 {
		e.arl, e.se = math.Inf(1), math.Inf(1)
		return e, 0
	}
	e.arl = e.expo / float64(e.events)
	if e.events == len(paths) && len(paths) > 1 {
		n := float64(len(paths))
		v := (sum2 - sum*sum/n) / (n - 1)
		e.se = math.Sqrt(math.Max(v, 0) / n)
	} else {
		e.se = e.arl / math.Sqrt(float64(e.events))
	}
	return e, e.events
}

// levels returns the sorted distinct record values of all paths.
func levels(paths []pathRecord) []float64 {
	var hs []float64
	for i := range paths {
		hs = append(hs, paths[i].g...)
	}
	sort.Float64s(hs)
	out := hs[:0]
	for k, h := range hs {
		if k == 0 || h != out[len(out)-1] {
			out = append(out, h)
		}
	}
	return out
}

// levelForARL returns the smallest record level whose ARL0 estimate
// reaches a, interpolated linearly in log ARL0 between neighbouring levels.
func levelForARL(paths []pathRecord, a float64) (float64, bool) {
	hs := levels(paths)
	if len(hs) == 0 {
		return 0, false
	}
	// ARL0(h) is nondecreasing in h; binary search on the levels.
	k := sort.Search(len(hs), func(k int) bool {
		e, _ := arlAt(paths, hs[k])
		return e.arl >= a
	})
	if k == len(hs) {
		return 0, false
	}
	hi, _ := arlAt(paths, hs[k])
	if k == 0 || math.IsInf(hi.arl, 1) {
		return hs[k], true
	}
	lo, _ := arlAt(paths, hs[k-1])
	if hi.arl <= lo.arl {
		return hs[k], true
	}
	f := (math.Log(a) - math.Log(lo.arl)) / (math.Log(hi.arl) - math.Log(lo.arl))
	return hs[k-1] + f*(hs[k]-hs[k-1]), true
}

// limitEstimate is the outcome of estimateLimit.
type limitEstimate struct {
	limit, arl, se float64
	extrapolated   bool
	note           string
}

// estimateLimit picks h for the target ARL0 from in-control paths: directly
// when at least 90% of the paths alarmed by that level within the horizon,
// or when the horizon is at least twice the target and half the paths
// alarmed (the censored estimate total frames / alarms is then well
// determined: a geometric run length with mean T ends within 2T in 86% of
// paths); else by extrapolating the log hazard. Without the second rule a
// horizon of 2T (the work cap gives that for the full policy at 128 x 128,
// target 1000) sent the estimate to the tail fit over levels above the
// target, extrapolated downwards, which measured +9.5% (1000 + 1000
// paths) and +18% (100 + 200) in ARL0 on fresh paths.
func estimateLimit(paths []pathRecord, target float64, horizon int) (limitEstimate, error) {
	var out limitEstimate
	if len(paths) == 0 {
		return out, errors.New("monitor: calibration needs at least one path")
	}
	if h, ok := levelForARL(paths, target); ok {
		e, n := arlAt(paths, h)
		frac := float64(n) / float64(len(paths))
		if frac >= 0.9 || (float64(horizon) >= 2*target && frac >= 0.5) {
			out.limit, out.arl, out.se = h, e.arl, e.se
			out.note = fmt.Sprintf("direct: %d paths, %d alarmed by this limit within %d frames after the burn-in", len(paths), n, horizon)
			return out, nil
		}
	}
	return extrapolateLimit(paths, target)
}

// tailFit is a straight line log ARL0(h) = a + b h fitted at the levels hs.
type tailFit struct{ a, b float64 }

func (f tailFit) at(h float64) float64 { return f.a + f.b*h }

// fitTail fits log ARL0 against h by weighted least squares, with weight
// alarms(h) (the variance of log hazard is about 1/alarms), at nLevels
// levels spread evenly between the level where ARL0 is top/8 and the
// highest level with at least minEvents alarms.
func fitTail(paths []pathRecord, hLo, hHi float64) (tailFit, bool) {
	const nLevels = 10
	var sw, sx, sy, sxx, sxy float64
	for j := range nLevels {
		h := hLo + (hHi-hLo)*float64(j)/float64(nLevels-1)
		e, n := arlAt(paths, h)
		if n == 0 {
			continue
		}
		w, x, y := float64(n), h, math.Log(e.arl)
		sw += w
		sx += w * x
		sy += w * y
		sxx += w * x * x
		sxy += w * x * y
	}
	den := sw*sxx - sx*sx
	if sw == 0 || den <= 0 {
		return tailFit{}, false
	}
	b := (sw*sxy - sx*sy) / den
	return tailFit{a: (sy - b*sx) / sw, b: b}, b > 0
}

// fitRange picks the levels used by the tail fit: from the level whose
// ARL0 is a tenth of the highest well-estimated one (and at least 20
// frames) up to the highest level with at least minEvents alarms.
func fitRange(paths []pathRecord) (lo, hi float64, ok bool) {
	minEvents := max(20, len(paths)/8)
	hs := levels(paths)
	// Highest level with >= minEvents alarms: alarms(h) is nonincreasing.
	k := sort.Search(len(hs), func(k int) bool {
		_, n := arlAt(paths, hs[k])
		return n < minEvents
	})
	if k == 0 {
		return 0, 0, false
	}
	hi = hs[k-1]
	top, _ := arlAt(paths, hi)
	lo, ok = levelForARL(paths, math.Max(top.arl/10, 20))
	if !ok || lo >= hi {
		return 0, 0, false
	}
	return lo, hi, true
}

// extrapolateLimit extrapolates log ARL0 linearly in h beyond the levels the
// paths reach (geometric tail; see Calibrate), and bootstraps the paths to
// give the uncertainty of ARL0 at the chosen limit.
func extrapolateLimit(paths []pathRecord, target float64) (limitEstimate, error) {
	var out limitEstimate
	lo, hi, ok := fitRange(paths)
	if !ok {
		return out, fmt.Errorf("monitor: too few in-control alarms (%d paths) to extrapolate to ARL0 %.4g; give more paths or a longer horizon", len(paths), target)
	}
	fit, ok := fitTail(paths, lo, hi)
	if !ok {
		return out, errors.New("monitor: log ARL0 does not rise with the limit in the simulated range; cannot extrapolate")
	}
	h := (math.Log(target) - fit.a) / fit.b
	top, _ := arlAt(paths, hi)
	bottom, _ := arlAt(paths, lo)
	// Bootstrap over paths: refit on resampled paths (same levels) and read
	// the predicted log ARL0 at h.
	const nBoot = 100
	rng := rand.New(rand.NewPCG(0x243f6a8885a308d3, uint64(len(paths))))
	res := make([]pathRecord, len(paths))
	var s1, s2 float64
	nb := 0
	for range nBoot {
		for i := range res {
			res[i] = paths[rng.IntN(len(paths))]
		}
		f, ok := fitTail(res, lo, hi)
		if !ok {
			continue
		}
		y := f.at(h)
		s1 += y
		s2 += y * y
		nb++
	}
	sdLog := math.Inf(1)
	if nb > 1 {
		mean := s1 / float64(nb)
		sdLog = math.Sqrt(math.Max(s2/float64(nb)-mean*mean, 0) * float64(nb) / float64(nb-1))
	}
	out.limit, out.arl, out.se, out.extrapolated = h, target, target*sdLog, true
	out.note = fmt.Sprintf("extrapolated: log ARL0 fitted linear in h over h = %.3g..%.3g (ARL0 %.3g..%.3g, %d paths), slope %.3g per unit of h; "+
		"at h = %.4g the fit's ARL0 is uncertain by a factor %.2f (1 s.e., bootstrap over paths); the geometric-tail assumption itself is not in that figure",
		lo, hi, bottom.arl, top.arl, len(paths), fit.b, h, math.Exp(sdLog))
	return out, nil
}

// progress serialises progress callbacks from the workers.
type progress struct {
	mu          sync.Mutex
	fn          func(done, total int)
	done, total int
}

func newProgress(fn func(done, total int), total int) *progress {
	return &progress{fn: fn, total: total}
}

func (p *progress) add(n int) {
	if p == nil || p.fn == nil {
		return
	}
	p.mu.Lock()
	p.done += n
	p.fn(p.done, p.total)
	p.mu.Unlock()
}
