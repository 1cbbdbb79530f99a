package review

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"
	"time"

	"sparsewatch/frames"
	"sparsewatch/monitor"
)

// Hooks are called from the goroutine running Run, in frame order. Any
// may be nil. Values they receive are valid only during the call.
type Hooks struct {
	// Reference is called after each reference frame is learnt.
	Reference func(done, total int)
	// Calibrating reports calibration progress of run r (its policy).
	Calibrating func(r int, policy string, done, total int)
	// Calibrated is called once run r has its control limit.
	Calibrated func(r int, policy string, cal monitor.Calibration)
	// Frame is called after each watched frame of each run.
	Frame func(FrameEvent)
	// Alarm is called when an episode starts (a.EndFrame == -1) and again
	// when it ends.
	Alarm func(r int, policy string, a Alarm)
	// Error is called for each bad input; the review goes on.
	Error func(FileError)
}

// FrameEvent is one watched frame of one run.
type FrameEvent struct {
	Run    int
	Policy string
	Index  int    // frame index in the sequence
	Name   string // file name
	Total  int    // frames expected in the sequence, -1 unknown
	Update *monitor.Update
	Tiler  *frames.Tiler
	// Local writes every stream's current local statistic into dst (grown
	// if short) for heat views; O(m), so call it at a bounded rate.
	Local func(dst []float32) []float32
	// PixelsRead and BytesRead are this frame's; the totals run over the whole run.
	PixelsRead, BytesRead           int64
	TotalPixelsRead, TotalBytesRead int64
}

// Run reviews src with one set of parameters.
func Run(ctx context.Context, src frames.Source, p Params, h Hooks) (Report, error) {
	reps, err := RunPolicies(ctx, src, p, []string{p.Policy}, h)
	if err != nil {
		return Report{}, err
	}
	return reps[0], nil
}

// RunPolicies reviews src once for every policy on the same frames: each
// frame is decoded once and handed to one engine per policy, each with its
// own calibrated limit. Reports come back in the order of policies.
func RunPolicies(ctx context.Context, src frames.Source, p Params, policies []string, h Hooks) ([]Report, error) {
	start := time.Now()
	if len(policies) == 0 {
		return nil, errors.New("review: no policy to run")
	}
	runs := make([]*run, len(policies))
	for i, pol := range policies {
		q := p
		q.Policy = strings.TrimSpace(pol)
		if err := q.Validate(); err != nil {
			return nil, fmt.Errorf("review: %w", err)
		}
		runs[i] = &run{p: q}
	}
	rv := &reviewer{src: src, p: p, h: h, runs: runs, total: src.Len()}
	if err := rv.learn(ctx); err != nil {
		return nil, err
	}
	if err := rv.calibrate(ctx); err != nil {
		return nil, err
	}
	if err := rv.watch(ctx); err != nil {
		return nil, err
	}
	reps := make([]Report, len(runs))
	for i, r := range runs {
		reps[i] = rv.report(r, time.Since(start))
	}
	return reps, nil
}

// run is one policy's engine and tallies.
type run struct {
	p      Params
	model  *monitor.Model // its own copy: a self-start model learns from what this run reads
	cfg    monitor.Config
	eng    *monitor.Engine
	cal    *Calibration
	alarms []Alarm
	open   int // index in alarms of the episode still on, -1 none
	pixels int64
	bytes  int64
	raw    []float32
	z      []float32
	miss   []bool
	stepAt []int32 // engine frame -> sequence index
	frames int
}

type reviewer struct {
	src   frames.Source
	p     Params
	h     Hooks
	runs  []*run
	total int

	w, ht     int
	tiler     *frames.Tiler
	model     *monitor.Model
	refPixels int64
	refBytes  int64
	refFrames int
	refSeen   int // items consumed by the reference phase
	firstW    int
	errs      []FileError
	warns     []string
	refStack  [][]float32 // raw reference stream values, kept for a bootstrap calibration
}

func (rv *reviewer) fail(it frames.Item, err error) {
	fe := FileError{Frame: it.Index, File: it.Name, Reason: reason(it.Name, err)}
	rv.errs = append(rv.errs, fe)
	if rv.h.Error != nil {
		rv.h.Error(fe)
	}
}

// reason strips the prefixes that repeat the file name.
func reason(name string, err error) string {
	s := err.Error()
	s = strings.TrimPrefix(s, "frames: ")
	s = strings.TrimPrefix(s, name+": ")
	return s
}

// learn reads the first ReferenceFrames good frames whole and builds the
// per-stream model.
func (rv *reviewer) learn(ctx context.Context) error {
	n := rv.p.ReferenceFrames
	var lr *monitor.Learner
	var full frames.Frame
	var means []float32
	bootstrap := rv.p.Calibration == "bootstrap"
	for rv.refFrames < n {
		if err := ctx.Err(); err != nil {
			return err
		}
		it, err := rv.src.Next()
		if err == io.EOF {
			return fmt.Errorf("review: the sequence has %d good frames; %d reference frames are needed before watching can start", rv.refFrames, n)
		}
		if err != nil {
			return fmt.Errorf("review: %w", err)
		}
		rv.refSeen++
		if it.Err != nil {
			rv.fail(it, it.Err)
			continue
		}
		f, nb, err := frames.Full(it, &full)
		if err == nil {
			err = frames.CheckAnyValid(f)
		}
		if err != nil {
			rv.fail(it, err)
			continue
		}
		if lr == nil {
			rv.w, rv.ht = f.Width, f.Height
			if rv.tiler, err = frames.NewTiler(f.Width, f.Height, rv.p.Tile); err != nil {
				return fmt.Errorf("review: %w", err)
			}
			m := rv.tiler.Streams()
			if lr, err = monitor.NewLearner(m, n, monitor.ModelOptions{Kind: monitor.ModelKind(rv.p.Model)}); err != nil {
				return fmt.Errorf("review: %w", err)
			}
			means = make([]float32, m)
			if bootstrap && int64(m)*int64(n) > 1<<27 {
				bootstrap = false
				rv.warns = append(rv.warns, fmt.Sprintf("bootstrap calibration needs %d x %d reference values; using the normal model (use --tile)", n, m))
			}
		}
		rv.tiler.Means(f, means)
		if err := lr.Add(means); err != nil {
			return fmt.Errorf("review: %w", err)
		}
		if bootstrap {
			rv.refStack = append(rv.refStack, append([]float32(nil), means...))
		}
		rv.refFrames++
		rv.refPixels += int64(f.Width * f.Height)
		rv.refBytes += it.Bytes + nb
		if rv.h.Reference != nil {
			rv.h.Reference(rv.refFrames, n)
		}
	}
	md, err := lr.Model()
	if err != nil {
		return fmt.Errorf("review: %w", err)
	}
	rv.model = md
	if md.Floored > 0 {
		rv.warns = append(rv.warns, fmt.Sprintf("%d streams had (nearly) zero spread over the reference frames; their scale was raised to the floor of %g", md.Floored, monitor.DefaultScaleFloor))
	}
	dead := 0
	for _, d := range md.Dead {
		if d {
			dead++
		}
	}
	if dead > 0 {
		rv.warns = append(rv.warns, fmt.Sprintf("%d streams had fewer than 2 valid reference values; they are treated as missing", dead))
	}
	return nil
}

// calibrate builds each run's engine and sets its limit.
func (rv *reviewer) calibrate(ctx context.Context) error {
	m := rv.tiler.Streams()
	var boot [][]float32
	estimated := false // boot holds estimated-model frames, whose streams must stay put
	if rv.refStack != nil {
		for _, raw := range rv.refStack {
			z := make([]float32, m)
			rv.model.StandardizeFrame(z, raw)
			boot = append(boot, z)
		}
		rv.refStack = nil
	}
	needCal := false
	for _, r := range rv.runs {
		needCal = needCal || r.p.Limit <= 0
	}
	// A self-start model's scores are N(0,1) whatever the reference error,
	// so "estimated" is the normal model for it.
	if needCal && (rv.p.Calibration == "" || rv.p.Calibration == "estimated") && rv.model.Kind != monitor.SelfStart {
		b := estimatedFrameCount
		for b > 16 && int64(b)*int64(m) > 1<<26 {
			b /= 2
		}
		if int64(b)*int64(m) <= 1<<27 {
			var err error
			estimated = true
			if boot, err = estimatedFrames(m, rv.refFrames, b, monitor.ModelKind(rv.p.Model), rv.p.Seed+7); err != nil {
				return fmt.Errorf("review: %w", err)
			}
		} else {
			rv.warns = append(rv.warns, fmt.Sprintf("%d streams are too many for the estimated calibration; the limit assumes a perfectly known model (use --tile)", m))
		}
	}
	for i, r := range rv.runs {
		q, err := r.p.Streams(m)
		if err != nil {
			return fmt.Errorf("review: %w", err)
		}
		pol, _ := monitor.ParsePolicy(r.p.Policy)
		if pol == monitor.Full {
			q = m
		}
		r.cfg = monitor.Config{Width: rv.tiler.GW, Height: rv.tiler.GH, Budget: q, TopR: min(r.p.TopR, m),
			Shift: r.p.Shift, Policy: pol, CompFraction: r.p.Compensation, Seed: r.p.Seed}
		if r.p.Compensation == 0 && pol != monitor.Full {
			// Zero compensation is a legal choice; a tiny value stands for it
			// because the engine reads 0 as "use the default".
			r.cfg.Compensation = 1e-12
		}
		limit := r.p.Limit
		if limit <= 0 {
			t0 := time.Now()
			work := r.p.Work
			if work <= 0 {
				work = DefaultWork
			}
			paths := r.p.Paths
			if paths <= 0 {
				paths = defaultPaths
			}
			spec := monitor.CalibrationSpec{Config: r.cfg, TargetARL0: r.p.ARL0, Paths: paths, Verify: max(10, paths/2),
				WorkCap: work, Burnin: r.p.Burnin, Bootstrap: boot, FixedStreams: estimated, Seed: r.p.Seed + 1}
			if rv.h.Calibrating != nil {
				idx, name := i, r.p.Policy
				spec.Progress = func(done, total int) { rv.h.Calibrating(idx, name, done, total) }
			}
			cal, err := monitor.Calibrate(ctx, spec)
			if err != nil {
				return fmt.Errorf("review: calibrating %s: %w", r.p.Policy, err)
			}
			limit = cal.Limit
			r.cal = &Calibration{TargetARL0: r.p.ARL0, ARL0: finite(cal.ARL0), ARL0SE: finite(cal.ARL0SE),
				VerifiedARL0: finite(cal.VerifiedARL0), VerifiedSE: finite(cal.VerifiedSE), Model: cal.Model,
				Extrapolated: cal.Extrapolated, Paths: cal.Paths, Note: cal.Note, Seconds: time.Since(t0).Seconds()}
			if rv.h.Calibrated != nil {
				rv.h.Calibrated(i, r.p.Policy, cal)
			}
		}
		r.cfg.Limit = limit
		if r.eng, err = monitor.New(r.cfg); err != nil {
			return fmt.Errorf("review: %w", err)
		}
		r.model = rv.model.Clone()
		r.raw, r.z, r.miss = make([]float32, m), make([]float32, m), make([]bool, m)
		r.open = -1
	}
	return nil
}

// defaultPaths is the review's number of calibration paths.
const defaultPaths = 100

// estimatedFrameCount is how many frames the estimated calibration draws
// from (fewer for very large grids, to bound memory).
const estimatedFrameCount = 64

// watch runs every remaining frame through every engine.
func (rv *reviewer) watch(ctx context.Context) error {
	rv.firstW = -1
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		it, err := rv.src.Next()
		if err == io.EOF {
			break
		}
		if err != nil {
			return fmt.Errorf("review: %w", err)
		}
		if rv.firstW < 0 {
			rv.firstW = it.Index
		}
		if it.Err != nil {
			rv.fail(it, it.Err)
			continue
		}
		if w, h := it.Pixels.Size(); w != rv.w || h != rv.ht {
			rv.fail(it, &frames.SizeMismatchError{Width: w, Height: h, WantWidth: rv.w, WantHeight: rv.ht})
			continue
		}
		for ri, r := range rv.runs {
			if err := rv.step(ri, r, it); err != nil && ri == 0 {
				rv.fail(it, err)
			}
		}
	}
	return nil
}

// errNoValue marks a frame none of whose read streams had a value.
type errNoValue struct{ n int }

func (e errNoValue) Error() string {
	return fmt.Sprintf("none of the %d streams read has a value (all pixels missing); frame skipped", e.n)
}

func (rv *reviewer) step(ri int, r *run, it frames.Item) error {
	idx := r.eng.Next()
	k := len(idx)
	raw, z, miss := r.raw[:k], r.z[:k], r.miss[:k]
	nb, err := rv.tiler.Read(it.Pixels, idx, raw)
	// Each run is charged what it would cost alone: the item's own bytes
	// (the whole file for a decoded image) plus its pixel reads.
	r.bytes += nb + it.Bytes
	if err != nil {
		return err
	}
	px := rv.tiler.PixelsPerStream(idx)
	r.pixels += px
	r.model.Standardize(z, miss, idx, raw)
	valid := 0
	for _, m := range miss {
		if !m {
			valid++
		}
	}
	if valid == 0 {
		return errNoValue{k}
	}
	upd, err := r.eng.Step(z, miss)
	if err != nil {
		return err
	}
	if r.model != nil && upd.State == monitor.Watching {
		r.model.Learn(idx, raw, miss)
	}
	r.stepAt = append(r.stepAt, int32(it.Index))
	r.frames++
	if upd.Started != nil {
		start := rv.regions(r, upd.Started.Regions)
		a := Alarm{Frame: r.seq(upd.Started.Frame), EndFrame: -1, Peak: upd.Started.Peak,
			Regions: append([]Region(nil), start...), StartRegions: start}
		r.alarms = append(r.alarms, a)
		r.open = len(r.alarms) - 1
		if rv.h.Alarm != nil {
			rv.h.Alarm(ri, r.p.Policy, a)
		}
	}
	if r.open >= 0 && upd.G >= r.alarms[r.open].Peak && len(upd.Regions) > 0 {
		// The report keeps the regions at the episode's largest G so far:
		// at the alarm frame only the first few streams of a change stand
		// out; at the peak the region is the fuller picture.
		a := &r.alarms[r.open]
		a.Peak = upd.G
		a.Regions = rv.regionsInto(a.Regions[:0], r, upd.Regions)
	}
	if upd.Ended != nil && r.open >= 0 {
		a := &r.alarms[r.open]
		a.EndFrame = r.seq(upd.Ended.Frame)
		if upd.Ended.Peak > a.Peak && len(upd.Ended.Regions) > 0 {
			a.Regions = rv.regionsInto(a.Regions[:0], r, upd.Ended.Regions)
		}
		a.Peak = math.Max(a.Peak, upd.Ended.Peak)
		r.open = -1
		if rv.h.Alarm != nil {
			rv.h.Alarm(ri, r.p.Policy, *a)
		}
	}
	if rv.h.Frame != nil {
		rv.h.Frame(FrameEvent{Run: ri, Policy: r.p.Policy, Index: it.Index, Name: it.Name, Total: rv.total, Update: &upd,
			Tiler: rv.tiler, Local: r.eng.Local, PixelsRead: px, BytesRead: nb, TotalPixelsRead: rv.refPixels + r.pixels, TotalBytesRead: rv.refBytes + r.bytes})
	}
	return nil
}

// seq maps an engine frame number to the sequence index.
func (r *run) seq(f int) int {
	if f >= 0 && f < len(r.stepAt) {
		return int(r.stepAt[f])
	}
	if f < 0 && len(r.stepAt) > 0 {
		return int(r.stepAt[0]) - 1
	}
	return f
}

// regions maps engine regions (stream grid) to pixel coordinates.
func (rv *reviewer) regions(r *run, in []monitor.Region) []Region {
	return rv.regionsInto(make([]Region, 0, len(in)), r, in)
}

// regionsInto appends the mapped regions to out.
func (rv *reviewer) regionsInto(out []Region, r *run, in []monitor.Region) []Region {
	t := rv.tiler
	for _, g := range in {
		cx, cy := t.PixelPoint(g.CX, g.CY)
		out = append(out, Region{BBox: t.PixelBox(g.X0, g.Y0, g.X1, g.Y1), Centroid: [2]float64{round2(cx), round2(cy)},
			Area: g.Area * t.K * t.K, Onset: r.seq(g.Onset), Peak: round2(g.Peak)})
	}
	return out
}

func (rv *reviewer) report(r *run, took time.Duration) Report {
	rep := Report{Width: rv.w, Height: rv.ht, Streams: rv.tiler.Streams(), Budget: r.cfg.Budget, ControlLimit: r.cfg.Limit,
		Frames: rv.refFrames + r.frames, PixelsRead: rv.refPixels + r.pixels, Alarms: r.alarms, BytesRead: rv.refBytes + r.bytes,
		Policy: r.p.Policy, Tile: rv.tiler.K, GridWidth: rv.tiler.GW, GridHeight: rv.tiler.GH, TopR: r.cfg.TopR, Shift: r.cfg.Shift,
		Compensation: r.eng.Compensation(), ReferenceFrames: rv.refFrames, FirstWatched: rv.firstW, FramesWatched: r.frames,
		WatchPixelsRead: r.pixels, WatchBytesRead: r.bytes, Model: rv.p.Model, Calibration: r.cal, Errors: rv.errs, Warnings: rv.warns, Seconds: took.Seconds()}
	if rep.Alarms == nil {
		rep.Alarms = []Alarm{}
	}
	if rep.Errors == nil {
		rep.Errors = []FileError{}
	}
	return rep
}

func finite(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return -1
	}
	return v
}

func round2(v float64) float64 { return math.Round(v*100) / 100 }
