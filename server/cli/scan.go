package cli

import (
	"bufio"
	"context"
	"encoding/csv"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"sparsewatch/frames"
	"sparsewatch/server/htmlreport"
	"sparsewatch/server/review"
)

// runScan reviews a folder, a .zip or piped frames offline and writes the
// report (DESIGN.md, "scan writes a JSON report").
func runScan(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "scan", "scan DIR|FILE.zip|FILE|- [flags]")
	d := review.DefaultParams()
	budget := fs.String("budget", d.Budget, `streams read per frame: "3%", "0.03" or a count "500"`)
	tile := fs.Int("tile", d.Tile, "k: streams are the means of k x k pixel tiles")
	warmup := fs.Int("warmup", d.ReferenceFrames, "reference frames: the first N good frames learn each stream's in-control level and scale")
	arl0 := fs.Float64("arl0", d.ARL0, "target in-control run length in frames (mean frames between false alarms)")
	policy := fs.String("policy", d.Policy, "sampling policy: adaptive|thompson|spatial|random|stride|full")
	shift := fs.Float64("shift", d.Shift, "design shift d in noise units")
	topR := fs.Int("top-r", d.TopR, "local statistics summed into the global statistic")
	comp := fs.Float64("compensation", d.Compensation, "compensation for unread streams, as a fraction of its ceiling c_max")
	seed := fs.Uint64("seed", 1, "random seed (random and thompson policies, calibration)")
	model := fs.String("model", d.Model, "reference model: self-start (learns on while watching)|robust|normal-score|mean-sd")
	calib := fs.String("calibration", d.Calibration, "in-control model for the limit: estimated|normal|bootstrap")
	paths := fs.Int("paths", 0, "calibration paths (0 = the calibrator's default)")
	limit := fs.Float64("limit", 0, "use this control limit and skip calibration")
	out := fs.String("out", "", "write the JSON report here (default stdout)")
	alarmsOut := fs.String("alarms", "", "also write the alarms to FILE.csv or FILE.jsonl")
	statsOut := fs.String("stats", "", "also write frame,G,limit,pixels_read for every watched frame to FILE.csv")
	compare := fs.String("compare", "", "run several policies on the same frames, e.g. adaptive,random,full, and print a table")
	truthPath := fs.String("truth", "", "ground truth (truth.json of a demo scenario): the table then shows delay and whether the box holds the centre")
	htmlOut := fs.String("report", "", "also write a self-contained HTML report (parameters, statistic chart, alarm pictures, alarm table) to FILE.html")
	fs.StringVar(htmlOut, "html", "", "the same as --report")
	maxPixels := fs.Int64("max-pixels", frames.DefaultMaxPixels, "refuse frames with more pixels than this")
	pos, err := parseInterspersed(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		fmt.Fprintln(env.Stderr, "scan: give one folder, .zip, frame file, or - for frames on stdin")
		fs.Usage()
		return errUsage
	}
	p := review.Params{Budget: *budget, Policy: *policy, TopR: *topR, Shift: *shift, Compensation: *comp, Tile: *tile,
		ARL0: *arl0, ReferenceFrames: *warmup, Model: *model, Seed: *seed, Limit: *limit, Calibration: *calib, Paths: *paths}
	policies := []string{*policy}
	if *compare != "" {
		policies = splitList(*compare)
		p.Policy = policies[0]
	}
	if err := p.Validate(); err != nil {
		return err
	}
	var truth *scanTruth
	if *truthPath != "" {
		t, err := readTruth(*truthPath)
		if err != nil {
			return err
		}
		truth = t
	}

	src, lst, err := openScanSource(env, pos[0], frames.Options{MaxPixels: *maxPixels})
	if err != nil {
		return err
	}
	// Decode the next frames in a second goroutine while the engines work.
	src = frames.Prefetch(src, 2)
	defer src.Close()

	var stats *csv.Writer
	if *statsOut != "" {
		f, err := os.Create(*statsOut)
		if err != nil {
			return err
		}
		defer f.Close()
		bw := bufio.NewWriter(f)
		defer bw.Flush()
		stats = csv.NewWriter(bw)
		head := []string{"frame", "G", "limit", "pixels_read"}
		if len(policies) > 1 {
			head = append([]string{"policy"}, head...)
		}
		stats.Write(head)
		defer stats.Flush()
	}

	prog := newScanProgress(env.Stderr, src.Len(), len(policies))
	var series htmlreport.Recorder
	rec := make([]string, 0, 5)
	hooks := review.Hooks{
		Reference: func(done, total int) { prog.reference(done, total) },
		Calibrating: func(r int, pol string, done, total int) {
			prog.calibrating(pol, done, total)
		},
		Frame: func(e review.FrameEvent) {
			if stats != nil {
				rec = rec[:0]
				if len(policies) > 1 {
					rec = append(rec, e.Policy)
				}
				rec = append(rec, strconv.Itoa(e.Index), strconv.FormatFloat(e.Update.G, 'g', 6, 64),
					strconv.FormatFloat(e.Update.Limit, 'g', 6, 64), strconv.FormatInt(e.PixelsRead, 10))
				stats.Write(rec)
			}
			if e.Run == 0 {
				prog.frame(e.Index)
				if *htmlOut != "" {
					series.Frame(e)
				}
			}
		},
	}
	reps, err := review.RunPolicies(ctx, src, p, policies, hooks)
	prog.finish()
	if err != nil {
		return err
	}
	for i := range reps {
		reps[i].Skipped = lst.Skipped
	}
	if *alarmsOut != "" {
		if err := writeAlarms(*alarmsOut, reps); err != nil {
			return err
		}
	}
	if *htmlOut != "" {
		// Alarm pictures need the frames again; a pipe cannot be re-read.
		var again frames.Source
		if pos[0] != "-" {
			again, _, _ = frames.Open(pos[0], frames.Options{MaxPixels: *maxPixels})
		}
		if err := htmlreport.WriteFile(*htmlOut, reps[0], series.Points, again); err != nil {
			return err
		}
	}
	if len(policies) == 1 {
		return writeJSON(env.Stdout, *out, reps[0])
	}
	if *out != "" {
		if err := writeJSON(env.Stdout, *out, struct {
			Runs []review.Report `json:"runs"`
		}{reps}); err != nil {
			return err
		}
	}
	writeCompare(env.Stdout, reps, truth)
	return nil
}

// parseInterspersed parses flags that may come before or after the
// positional arguments ("scan DIR --budget 3%" as the design writes it),
// and returns the positional ones. "-" is a positional argument.
func parseInterspersed(fs *flag.FlagSet, args []string) ([]string, error) {
	var pos []string
	for {
		if err := parse(fs, args); err != nil {
			return nil, err
		}
		args = fs.Args()
		if len(args) == 0 {
			return pos, nil
		}
		pos = append(pos, args[0])
		args = args[1:]
	}
}

func splitList(s string) []string {
	var out []string
	for _, v := range strings.Split(s, ",") {
		if v = strings.TrimSpace(v); v != "" {
			out = append(out, v)
		}
	}
	return out
}

func openScanSource(env Env, arg string, opts frames.Options) (frames.Source, *frames.Listing, error) {
	if arg == "-" {
		return frames.NewImageStream(env.Stdin, "stdin", opts), &frames.Listing{}, nil
	}
	src, lst, err := frames.Open(arg, opts)
	if err != nil {
		return nil, nil, err
	}
	if len(lst.Frames) == 0 {
		src.Close()
		return nil, nil, fmt.Errorf("%s holds no frame files (.png .jpg .gif .bmp .tif .webp .fits)", arg)
	}
	return src, lst, nil
}

func writeJSON(stdout io.Writer, path string, v any) error {
	w := stdout
	if path != "" {
		f, err := os.Create(path)
		if err != nil {
			return err
		}
		defer f.Close()
		w = f
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	if err := enc.Encode(v); err != nil {
		return err
	}
	if f, ok := w.(*os.File); ok && path != "" {
		return syncRegular(f)
	}
	return nil
}

// syncRegular flushes a regular file to disk; devices and pipes (such as
// /dev/null) cannot be synced and need not be.
func syncRegular(f *os.File) error {
	if st, err := f.Stat(); err != nil || !st.Mode().IsRegular() {
		return nil
	}
	return f.Sync()
}

// writeAlarms writes every run's alarms as CSV (one row per alarm, its
// first region) or JSON lines (one alarm object per line), by extension.
func writeAlarms(path string, reps []review.Report) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	defer f.Close()
	bw := bufio.NewWriter(f)
	switch strings.ToLower(filepath.Ext(path)) {
	case ".jsonl", ".ndjson":
		enc := json.NewEncoder(bw)
		for _, r := range reps {
			for _, a := range r.Alarms {
				if err := enc.Encode(struct {
					Policy string `json:"policy"`
					review.Alarm
				}{r.Policy, a}); err != nil {
					return err
				}
			}
		}
	case ".csv":
		cw := csv.NewWriter(bw)
		cw.Write([]string{"policy", "frame", "end_frame", "peak", "regions", "x0", "y0", "x1", "y1", "cx", "cy", "area", "onset"})
		for _, r := range reps {
			for _, a := range r.Alarms {
				row := []string{r.Policy, strconv.Itoa(a.Frame), strconv.Itoa(a.EndFrame), ff(a.Peak), strconv.Itoa(len(a.Regions))}
				if len(a.Regions) > 0 {
					g := a.Regions[0]
					row = append(row, strconv.Itoa(g.BBox[0]), strconv.Itoa(g.BBox[1]), strconv.Itoa(g.BBox[2]), strconv.Itoa(g.BBox[3]),
						ff(g.Centroid[0]), ff(g.Centroid[1]), strconv.Itoa(g.Area), strconv.Itoa(g.Onset))
				} else {
					row = append(row, "", "", "", "", "", "", "", "")
				}
				cw.Write(row)
			}
		}
		cw.Flush()
		if err := cw.Error(); err != nil {
			return err
		}
	default:
		return fmt.Errorf("--alarms %s: name a .csv or .jsonl file", path)
	}
	if err := bw.Flush(); err != nil {
		return err
	}
	return syncRegular(f)
}

func ff(v float64) string { return strconv.FormatFloat(v, 'f', 2, 64) }

// scanTruth is the part of a demo scenario's truth.json the table uses.
type scanTruth struct {
	ChangeFrame int        `json:"change_frame"`
	EndFrame    int        `json:"end_frame"`
	Centre      [2]float64 `json:"centre"`
}

func readTruth(path string) (*scanTruth, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	var t scanTruth
	if err := json.Unmarshal(b, &t); err != nil {
		return nil, fmt.Errorf("--truth %s: %v", path, err)
	}
	return &t, nil
}

// Score is how one run did against the truth.
type scanScore struct {
	Before   int           // alarms starting before the change
	First    *review.Alarm // first alarm at or after the change
	Delay    int
	InBox    bool
	HasFirst bool
}

func score(r review.Report, t *scanTruth) scanScore {
	var s scanScore
	for i := range r.Alarms {
		a := &r.Alarms[i]
		if a.Frame < t.ChangeFrame {
			s.Before++
			continue
		}
		if s.First == nil {
			s.First, s.HasFirst, s.Delay = a, true, a.Frame-t.ChangeFrame
			if len(a.Regions) > 0 {
				b := a.Regions[0].BBox
				cx, cy := t.Centre[0], t.Centre[1]
				s.InBox = float64(b[0]) <= cx && cx <= float64(b[2]) && float64(b[1]) <= cy && cy <= float64(b[3])
			}
		}
	}
	return s
}

// writeCompare prints the runs side by side.
func writeCompare(w io.Writer, reps []review.Report, t *scanTruth) {
	r0 := reps[0]
	fmt.Fprintf(w, "%dx%d pixels, tile %d: %d streams; %d frames (%d reference), %d bad inputs\n",
		r0.Width, r0.Height, r0.Tile, r0.Streams, r0.Frames, r0.ReferenceFrames, len(r0.Errors))
	if t != nil {
		fmt.Fprintf(w, "truth: change from frame %d at (%.0f, %.0f)\n", t.ChangeFrame, t.Centre[0], t.Centre[1])
		fmt.Fprintf(w, "%-9s %7s %9s %6s %8s %6s %-22s %6s %14s %14s\n", "policy", "budget", "limit", "before", "alarm", "delay", "first region bbox", "centre", "pixels read", "bytes read")
	} else {
		fmt.Fprintf(w, "%-9s %7s %9s %6s %-24s %-22s %14s %14s\n", "policy", "budget", "limit", "alarms", "alarm frames", "first region bbox", "pixels read", "bytes read")
	}
	for _, r := range reps {
		box := "-"
		if len(r.Alarms) > 0 && len(r.Alarms[0].Regions) > 0 {
			box = fmt.Sprint(r.Alarms[0].Regions[0].BBox)
		}
		if t == nil {
			var fr []string
			for i, a := range r.Alarms {
				if i == 4 {
					fr = append(fr, "...")
					break
				}
				fr = append(fr, strconv.Itoa(a.Frame))
			}
			fmt.Fprintf(w, "%-9s %7d %9.3f %6d %-24s %-22s %14d %14d\n", r.Policy, r.Budget, r.ControlLimit, len(r.Alarms), strings.Join(fr, ","), box, r.PixelsRead, r.BytesRead)
			continue
		}
		s := score(r, t)
		alarm, delay, in := "none", "-", "-"
		box = "-"
		if s.HasFirst {
			alarm, delay = strconv.Itoa(s.First.Frame), strconv.Itoa(s.Delay)
			if len(s.First.Regions) > 0 {
				box = fmt.Sprint(s.First.Regions[0].BBox)
				in = "no"
				if s.InBox {
					in = "yes"
				}
			}
		}
		fmt.Fprintf(w, "%-9s %7d %9.3f %6d %8s %6s %-22s %6s %14d %14d\n", r.Policy, r.Budget, r.ControlLimit, s.Before, alarm, delay, box, in, r.PixelsRead, r.BytesRead)
	}
	for _, e := range r0.Errors {
		fmt.Fprintf(w, "bad input: frame %d %s: %s\n", e.Frame, e.File, e.Reason)
	}
}

// scanProgress prints one live line on stderr (frames done/total, frames/s,
// ETA) when stderr is a terminal, and nothing otherwise.
type scanProgress struct {
	w      io.Writer
	on     bool
	total  int
	last   time.Time
	shown  bool
	frames int       // watched frames so far
	wstart time.Time // first watched frame
}

func newScanProgress(w io.Writer, total, runs int) *scanProgress {
	return &scanProgress{w: w, on: isTerminal(w), total: total}
}

func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}

func (p *scanProgress) tick() bool {
	if !p.on {
		return false
	}
	now := time.Now()
	if now.Sub(p.last) < 200*time.Millisecond {
		return false
	}
	p.last, p.shown = now, true
	return true
}

func (p *scanProgress) reference(done, total int) {
	if p.tick() {
		fmt.Fprintf(p.w, "\r\x1b[Klearning reference frames %d/%d", done, total)
	}
}

func (p *scanProgress) calibrating(pol string, done, total int) {
	if p.tick() {
		fmt.Fprintf(p.w, "\r\x1b[Kcalibrating %s: %d/%d paths", pol, done, total)
	}
}

func (p *scanProgress) frame(index int) {
	if p.frames == 0 {
		p.wstart = time.Now()
	}
	p.frames++
	if !p.tick() {
		return
	}
	rate := float64(p.frames-1) / time.Since(p.wstart).Seconds()
	line := fmt.Sprintf("frame %d", index+1)
	if p.total > 0 {
		line += fmt.Sprintf("/%d", p.total)
	}
	if p.frames > 1 && rate > 0 {
		line += fmt.Sprintf(", %.1f frames/s", rate)
	}
	if p.total > 0 && p.frames > 1 && rate > 0 {
		eta := time.Duration(float64(p.total-index-1) / rate * float64(time.Second)).Round(time.Second)
		line += fmt.Sprintf(", ETA %s", eta)
	}
	fmt.Fprintf(p.w, "\r\x1b[K%s", line)
}

func (p *scanProgress) finish() {
	if p.shown {
		fmt.Fprint(p.w, "\r\x1b[K")
	}
}
