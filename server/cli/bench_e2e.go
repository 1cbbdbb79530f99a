package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"sparsewatch/frames"
	"sparsewatch/frames/fits"
	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

// benchE2E measures scan throughput against decode-only throughput of the
// same files in the same run: scan must do everything decoding does plus
// the engine, so the ratio says what the engine costs end to end. With
// --fits it also writes a FITS copy of the frames and measures budgeted
// reads: bytes read per watched frame against the file size.
func benchE2E(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "bench --e2e", "bench --e2e DIR [--budget 3%] [--policy P] [--tile K] [--runs N] [--fits DIR2] [--json]")
	fs.Bool("e2e", true, "end-to-end benchmark (this one)")
	d := review.DefaultParams()
	budget := fs.String("budget", d.Budget, `streams read per frame: "3%", "0.03" or a count "500"`)
	policy := fs.String("policy", d.Policy, "sampling policy")
	tile := fs.Int("tile", d.Tile, "k x k tile means as streams")
	warmup := fs.Int("warmup", d.ReferenceFrames, "reference frames")
	topR := fs.Int("top-r", d.TopR, "local statistics summed into G")
	limit := fs.Float64("limit", 0, "control limit (0 = calibrate with --paths paths; calibration time is not counted)")
	paths := fs.Int("paths", 100, "calibration paths when --limit is 0 (fewer cannot reach ARL0 10^4 by extrapolation)")
	runs := fs.Int("runs", 2, "alternating repetitions; the best of each is reported")
	fitsDir := fs.String("fits", "", "also write the frames as 16-bit FITS files into this folder and measure budgeted reads")
	asJSON := fs.Bool("json", false, "print the result as JSON")
	mergeGap := fs.Int("fits-merge-gap", 0, "FITS reads run through gaps of up to this many bytes (fewer reads, more bytes)")
	pos, err := parseInterspersed(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		fmt.Fprintln(env.Stderr, "bench --e2e: give one folder or .zip of frames")
		fs.Usage()
		return errUsage
	}
	p := d
	p.Budget, p.Policy, p.Tile, p.ReferenceFrames, p.TopR, p.Limit, p.Paths = *budget, *policy, *tile, *warmup, *topR, *limit, *paths
	if err := p.Validate(); err != nil {
		return err
	}
	var results []e2eResult
	r, err := benchFolder(ctx, pos[0], p, *runs, frames.Options{})
	if err != nil {
		return err
	}
	results = append(results, r)
	if *fitsDir != "" {
		if err := writeFITSCopy(pos[0], *fitsDir); err != nil {
			return err
		}
		p.Limit = r.Limit // same limit: the streams and model are the same
		rf, err := benchFolder(ctx, *fitsDir, p, *runs, frames.Options{FITSMergeGap: *mergeGap})
		if err != nil {
			return err
		}
		results = append(results, rf)
	}
	if *asJSON {
		enc := json.NewEncoder(env.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(map[string]any{"results": results})
	}
	w := env.Stdout
	for _, r := range results {
		fmt.Fprintf(w, "%s: %d frames %dx%d (%s), %s policy reading %d of %d streams a frame\n", r.Source, r.Frames, r.Width, r.Height, r.Format, r.Policy, r.Budget, r.Streams)
		fmt.Fprintf(w, "  decode only: %8.1f frames/s  (%.1f MB read, whole frames)\n", r.DecodeFPS, float64(r.DecodeBytes)/1e6)
		fmt.Fprintf(w, "  scan:        %8.1f frames/s  (%.1f MB read; decoding ahead in a second goroutine as scan does; calibration %.1f s not counted)\n", r.ScanFPS, float64(r.ScanBytes)/1e6, r.CalibrationSeconds)
		fmt.Fprintf(w, "  scan, one goroutine: %8.1f frames/s\n", r.ScanSeqFPS)
		fmt.Fprintf(w, "  scan / decode-only = %.2f (target >= 0.8); one goroutine: %.2f\n", r.Ratio, r.RatioSeq)
		fmt.Fprintf(w, "  per watched frame: %d bytes read of a %d-byte file (%.2f%%), %d pixels of %d\n",
			r.WatchBytesPerFrame, r.FileBytesPerFrame, 100*float64(r.WatchBytesPerFrame)/float64(max(1, r.FileBytesPerFrame)), r.WatchPixelsPerFrame, r.Width*r.Height)
	}
	return nil
}

type e2eResult struct {
	Source              string  `json:"source"`
	Format              string  `json:"format"`
	Frames              int     `json:"frames"`
	Width               int     `json:"width"`
	Height              int     `json:"height"`
	Streams             int     `json:"streams"`
	Budget              int     `json:"budget"`
	Policy              string  `json:"policy"`
	Limit               float64 `json:"limit"`
	DecodeFPS           float64 `json:"decode_fps"`
	ScanFPS             float64 `json:"scan_fps"`
	ScanSeqFPS          float64 `json:"scan_one_goroutine_fps"`
	Ratio               float64 `json:"ratio"`
	RatioSeq            float64 `json:"ratio_one_goroutine"`
	DecodeBytes         int64   `json:"decode_bytes"`
	ScanBytes           int64   `json:"scan_bytes"`
	CalibrationSeconds  float64 `json:"calibration_seconds"`
	WatchBytesPerFrame  int64   `json:"watch_bytes_per_frame"`
	FileBytesPerFrame   int64   `json:"file_bytes_per_frame"`
	WatchPixelsPerFrame int64   `json:"watch_pixels_per_frame"`
}

func benchFolder(ctx context.Context, dir string, p review.Params, runs int, opts frames.Options) (e2eResult, error) {
	res := e2eResult{Source: dir, Policy: p.Policy}
	files, fileBytes, format, err := warmCache(dir)
	if err != nil {
		return res, err
	}
	res.Format = format
	for i := 0; i < max(1, runs); i++ {
		n, nb, el, err := decodeOnly(ctx, dir)
		if err != nil {
			return res, err
		}
		if fps := float64(n) / el.Seconds(); fps > res.DecodeFPS {
			res.DecodeFPS, res.DecodeBytes, res.Frames = fps, nb, n
		}
		rep, scanTime, calTime, err := scanOnce(ctx, dir, p, opts, true)
		if err != nil {
			return res, err
		}
		if p.Limit <= 0 {
			p.Limit = rep.ControlLimit
		}
		seq, seqTime, _, err := scanOnce(ctx, dir, p, opts, false)
		if err != nil {
			return res, err
		}
		if fps := float64(seq.Frames) / seqTime.Seconds(); fps > res.ScanSeqFPS {
			res.ScanSeqFPS = fps
		}
		if calTime > 0 {
			res.CalibrationSeconds = calTime.Seconds()
		}
		if fps := float64(rep.Frames) / scanTime.Seconds(); fps > res.ScanFPS {
			res.ScanFPS, res.ScanBytes = fps, rep.BytesRead
			res.Width, res.Height, res.Streams, res.Budget, res.Limit = rep.Width, rep.Height, rep.Streams, rep.Budget, rep.ControlLimit
			if rep.FramesWatched > 0 {
				res.WatchBytesPerFrame = rep.WatchBytesRead / int64(rep.FramesWatched)
				res.WatchPixelsPerFrame = rep.WatchPixelsRead / int64(rep.FramesWatched)
			}
		}
	}
	if files > 0 {
		res.FileBytesPerFrame = fileBytes / int64(files)
	}
	if res.DecodeFPS > 0 {
		res.Ratio = res.ScanFPS / res.DecodeFPS
		res.RatioSeq = res.ScanSeqFPS / res.DecodeFPS
	}
	return res, nil
}

// warmCache reads every frame file once so neither timed pass pays for a
// cold disk, and returns the file count, total size and the first format.
func warmCache(dir string) (int, int64, string, error) {
	_, lst, err := frames.Open(dir, frames.Options{})
	if err != nil {
		return 0, 0, "", err
	}
	var total int64
	format := ""
	for _, name := range lst.Frames {
		b, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			return 0, 0, "", err
		}
		total += int64(len(b))
		if format == "" {
			format = string(frames.Sniff(b))
		}
	}
	return len(lst.Frames), total, format, nil
}

// decodeOnly reads every frame whole, as the reference phase does, and
// nothing else.
func decodeOnly(ctx context.Context, dir string) (int, int64, time.Duration, error) {
	src, _, err := frames.Open(dir, frames.Options{})
	if err != nil {
		return 0, 0, 0, err
	}
	defer src.Close()
	var f frames.Frame
	n := 0
	var nb int64
	start := time.Now()
	for {
		if err := ctx.Err(); err != nil {
			return 0, 0, 0, err
		}
		it, err := src.Next()
		if err == io.EOF {
			break
		}
		if err != nil {
			return 0, 0, 0, err
		}
		if it.Err != nil {
			continue
		}
		_, b, err := frames.Full(it, &f)
		if err != nil {
			continue
		}
		nb += it.Bytes + b
		n++
	}
	return n, nb, time.Since(start), nil
}

// scanOnce runs the review and returns its report, its time without the
// calibration, and the calibration's time.
func scanOnce(ctx context.Context, dir string, p review.Params, opts frames.Options, ahead bool) (review.Report, time.Duration, time.Duration, error) {
	src, _, err := frames.Open(dir, opts)
	if err != nil {
		return review.Report{}, 0, 0, err
	}
	if ahead {
		src = frames.Prefetch(src, 2) // as scan runs it
	}
	defer src.Close()
	var calStart, calEnd time.Time
	hooks := review.Hooks{
		Calibrating: func(int, string, int, int) {
			if calStart.IsZero() {
				calStart = time.Now()
			}
		},
		Calibrated: func(int, string, monitor.Calibration) { calEnd = time.Now() },
	}
	start := time.Now()
	rep, err := review.Run(ctx, src, p, hooks)
	total := time.Since(start)
	var cal time.Duration
	if !calStart.IsZero() && !calEnd.IsZero() {
		cal = calEnd.Sub(calStart)
	}
	return rep, total - cal, cal, err
}

// writeFITSCopy writes every good frame of dir as dst/frameNNNNN.fits
// (16-bit unsigned), skipping files that are there already.
func writeFITSCopy(dir, dst string) error {
	if err := os.MkdirAll(dst, 0o755); err != nil {
		return err
	}
	src, _, err := frames.Open(dir, frames.Options{})
	if err != nil {
		return err
	}
	defer src.Close()
	var f frames.Frame
	for {
		it, err := src.Next()
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return err
		}
		if it.Err != nil {
			continue
		}
		name := filepath.Join(dst, fmt.Sprintf("frame%05d.fits", it.Index))
		if _, err := os.Stat(name); err == nil {
			continue
		}
		g, _, err := frames.Full(it, &f)
		if err != nil {
			continue
		}
		out, err := os.Create(name)
		if err != nil {
			return err
		}
		pix := g.Pix
		if g.Stride != g.Width {
			pix = make([]float32, 0, g.Width*g.Height)
			for y := 0; y < g.Height; y++ {
				pix = append(pix, g.Pix[y*g.Stride:y*g.Stride+g.Width]...)
			}
		}
		if err := fits.WriteUint16(out, g.Width, g.Height, pix); err != nil {
			out.Close()
			return err
		}
		if err := out.Close(); err != nil {
			return err
		}
	}
}
