package htmlreport

import (
	"errors"
	"fmt"
	"image"
	"io"
	"math"
	"os"
	"sort"

	"sparsewatch/frames"
	"sparsewatch/server/review"
)

// Gray turns a frame of native values into an 8-bit grey picture,
// stretched between its 0.5th and 99.5th percentiles (a subsample of at
// most 64 Ki values) so a 16-bit or float frame stays readable; missing
// pixels are black.
func Gray(f frames.Frame) *image.Gray {
	img := image.NewGray(image.Rect(0, 0, f.Width, f.Height))
	n := f.Width * f.Height
	if n == 0 {
		return img
	}
	step := max(1, n/65536)
	var s []float32
	for i := 0; i < n; i += step {
		if v := f.Pix[(i/f.Width)*f.Stride+i%f.Width]; !math.IsNaN(float64(v)) {
			s = append(s, v)
		}
	}
	if len(s) == 0 {
		return img
	}
	sort.Slice(s, func(i, j int) bool { return s[i] < s[j] })
	lo, hi := float64(s[len(s)/200]), float64(s[len(s)-1-len(s)/200])
	if hi <= lo {
		hi = lo + 1
	}
	for y := 0; y < f.Height; y++ {
		row := f.Pix[y*f.Stride : y*f.Stride+f.Width]
		out := img.Pix[y*img.Stride : y*img.Stride+f.Width]
		for x, v := range row {
			if math.IsNaN(float64(v)) {
				continue
			}
			out[x] = uint8(math.Round(255 * math.Min(1, math.Max(0, (float64(v)-lo)/(hi-lo)))))
		}
	}
	return img
}

// Recorder collects the statistic series of run 0 of a review for a
// report. Use its Frame method as (or inside) review.Hooks.Frame.
type Recorder struct {
	Points []Point
	step   int
}

// maxPoints bounds the series a Recorder keeps; older points are thinned
// 2:1 when it fills.
const maxPoints = 8192

// Frame records one watched frame (run 0 only).
func (r *Recorder) Frame(ev review.FrameEvent) {
	if ev.Run != 0 || ev.Update == nil {
		return
	}
	if r.step == 0 {
		r.step = 1
	}
	if ev.Index%r.step != 0 {
		return
	}
	r.Points = append(r.Points, Point{Frame: ev.Index, G: ev.Update.G, Limit: ev.Update.Limit})
	if len(r.Points) >= maxPoints {
		r.step *= 2
		j := 0
		for _, p := range r.Points {
			if p.Frame%r.step == 0 {
				r.Points[j] = p
				j++
			}
		}
		r.Points = r.Points[:j]
	}
}

// Snapshots reads src (a fresh source over the same frames) and returns
// the frame at each alarm's start, as grey pictures.
func Snapshots(src frames.Source, alarms []review.Alarm) (map[int]image.Image, error) {
	want := map[int]bool{}
	last := -1
	for _, a := range alarms {
		want[a.Frame] = true
		last = max(last, a.Frame)
	}
	out := map[int]image.Image{}
	var fr frames.Frame
	for len(out) < len(want) {
		it, err := src.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return out, fmt.Errorf("htmlreport: %w", err)
		}
		if it.Index > last {
			break
		}
		if !want[it.Index] || it.Err != nil {
			continue
		}
		f, _, err := frames.Full(it, &fr)
		if err != nil {
			continue
		}
		out[it.Index] = Gray(*f)
	}
	return out, nil
}

// WriteFile writes the report of a finished review to path. series may
// come from a Recorder; src, when not nil, is a fresh source over the
// reviewed frames for the alarm pictures (it is closed).
func WriteFile(path string, rep review.Report, series []Point, src frames.Source) error {
	in := Input{Report: rep, Series: series}
	if src != nil {
		snaps, err := Snapshots(src, rep.Alarms)
		src.Close()
		if err != nil {
			return err
		}
		in.Snapshots = snaps
	}
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("htmlreport: %w", err)
	}
	if err := Write(f, in); err != nil {
		f.Close()
		return err
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("htmlreport: %w", err)
	}
	return nil
}
