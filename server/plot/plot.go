// Package plot draws small self-contained SVG line charts with error bars,
// such as detection delay against budget per sampling policy. It writes
// plain SVG 1.1 with no scripts, fonts or external assets.
package plot

import (
	"errors"
	"fmt"
	"html"
	"io"
	"math"
	"strings"
)

// Series is one line: points (X[i], Y[i]) with a symmetric error bar of
// half-length Err[i] (nil = none). Non-finite points are skipped.
type Series struct {
	Name      string
	X, Y, Err []float64
}

// Chart is a line chart. Zero sizes select 640 x 400.
type Chart struct {
	Title, XLabel, YLabel string
	LogX, LogY            bool
	Width, Height         int
	Series                []Series
}

// palette is our own set of distinguishable line colours.
var palette = []string{"#1f5fa8", "#c2462e", "#2c8c4a", "#8a4fb0", "#b8860b", "#3a8f9c", "#555555", "#d0488f"}

type axis struct {
	lo, hi float64
	log    bool
}

func (a axis) frac(v float64) float64 {
	if a.log {
		return (math.Log10(v) - math.Log10(a.lo)) / (math.Log10(a.hi) - math.Log10(a.lo))
	}
	return (v - a.lo) / (a.hi - a.lo)
}

// ticks returns tick values: powers 1, 2, 5 x 10^k on a log axis, or about
// six round steps on a linear one.
func (a axis) ticks() []float64 {
	var out []float64
	if a.log {
		for e := math.Floor(math.Log10(a.lo)); e <= math.Ceil(math.Log10(a.hi)); e++ {
			for _, f := range []float64{1, 2, 5} {
				v := f * math.Pow(10, e)
				if v >= a.lo*(1-1e-9) && v <= a.hi*(1+1e-9) {
					out = append(out, v)
				}
			}
		}
		return out
	}
	step := math.Pow(10, math.Floor(math.Log10((a.hi-a.lo)/5)))
	for _, f := range []float64{1, 2, 5, 10} {
		if (a.hi-a.lo)/(step*f) <= 7 {
			step *= f
			break
		}
	}
	for v := math.Ceil(a.lo/step) * step; v <= a.hi+step*1e-9; v += step {
		out = append(out, v)
	}
	return out
}

func newAxis(vals []float64, log bool) (axis, error) {
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range vals {
		if math.IsNaN(v) || math.IsInf(v, 0) || (log && v <= 0) {
			continue
		}
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	if lo > hi {
		return axis{}, errors.New("plot: no finite values to draw")
	}
	if log {
		lo, hi = math.Pow(10, math.Floor(math.Log10(lo)*4)/4), math.Pow(10, math.Ceil(math.Log10(hi)*4)/4)
		if lo == hi {
			lo, hi = lo/2, hi*2
		}
		return axis{lo, hi, true}, nil
	}
	if lo == hi {
		lo, hi = lo-1, hi+1
	}
	pad := (hi - lo) * 0.05
	if lo >= 0 && lo-pad < 0 {
		return axis{0, hi + pad, false}, nil
	}
	return axis{lo - pad, hi + pad, false}, nil
}

func label(v float64) string {
	s := fmt.Sprintf("%.4g", v)
	if strings.Contains(s, "e") {
		s = fmt.Sprintf("%.0e", v)
	}
	return s
}

// WriteSVG draws the chart to w.
func (c Chart) WriteSVG(w io.Writer) error {
	width, height := c.Width, c.Height
	if width <= 0 {
		width = 640
	}
	if height <= 0 {
		height = 400
	}
	var xs, ys []float64
	for _, s := range c.Series {
		if len(s.Y) != len(s.X) || (s.Err != nil && len(s.Err) != len(s.X)) {
			return fmt.Errorf("plot: series %q has %d x, %d y and %d error values", s.Name, len(s.X), len(s.Y), len(s.Err))
		}
		xs = append(xs, s.X...)
		for i, y := range s.Y {
			ys = append(ys, y)
			if s.Err != nil && !math.IsNaN(s.Err[i]) {
				ys = append(ys, y-s.Err[i], y+s.Err[i])
			}
		}
	}
	ax, err := newAxis(xs, c.LogX)
	if err != nil {
		return err
	}
	ay, err := newAxis(ys, c.LogY)
	if err != nil {
		return err
	}
	const left, right, top, bottom = 70.0, 150.0, 40.0, 50.0
	pw, ph := float64(width)-left-right, float64(height)-top-bottom
	px := func(v float64) float64 { return left + ax.frac(v)*pw }
	py := func(v float64) float64 { return top + (1-ay.frac(v))*ph }
	ok := func(x, y float64) bool {
		bad := func(v float64, log bool) bool { return math.IsNaN(v) || math.IsInf(v, 0) || (log && v <= 0) }
		return !bad(x, c.LogX) && !bad(y, c.LogY)
	}

	var b strings.Builder
	fmt.Fprintf(&b, `<svg xmlns="http://www.w3.org/2000/svg" width="%d" height="%d" viewBox="0 0 %d %d" font-family="sans-serif" font-size="12">`+"\n", width, height, width, height)
	fmt.Fprintf(&b, `<rect width="%d" height="%d" fill="#ffffff"/>`+"\n", width, height)
	if c.Title != "" {
		fmt.Fprintf(&b, `<text x="%.1f" y="22" text-anchor="middle" font-size="14">%s</text>`+"\n", left+pw/2, html.EscapeString(c.Title))
	}
	for _, v := range ax.ticks() {
		x := px(v)
		fmt.Fprintf(&b, `<line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="#e4e4e4"/>`+"\n", x, top, x, top+ph)
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f" text-anchor="middle">%s</text>`+"\n", x, top+ph+16, label(v))
	}
	for _, v := range ay.ticks() {
		y := py(v)
		fmt.Fprintf(&b, `<line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="#e4e4e4"/>`+"\n", left, y, left+pw, y)
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f" text-anchor="end">%s</text>`+"\n", left-6, y+4, label(v))
	}
	fmt.Fprintf(&b, `<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="none" stroke="#333333"/>`+"\n", left, top, pw, ph)
	if c.XLabel != "" {
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f" text-anchor="middle">%s</text>`+"\n", left+pw/2, top+ph+38, html.EscapeString(c.XLabel))
	}
	if c.YLabel != "" {
		fmt.Fprintf(&b, `<text transform="translate(18 %.1f) rotate(-90)" text-anchor="middle">%s</text>`+"\n", top+ph/2, html.EscapeString(c.YLabel))
	}
	for si, s := range c.Series {
		col := palette[si%len(palette)]
		var pts []string
		for i := range s.X {
			if !ok(s.X[i], s.Y[i]) {
				continue
			}
			x, y := px(s.X[i]), py(s.Y[i])
			pts = append(pts, fmt.Sprintf("%.1f,%.1f", x, y))
			if s.Err != nil && s.Err[i] > 0 && !math.IsInf(s.Err[i], 0) {
				lo, hi := s.Y[i]-s.Err[i], s.Y[i]+s.Err[i]
				if c.LogY && lo <= 0 {
					lo = ay.lo
				}
				y0, y1 := py(math.Max(lo, ay.lo)), py(math.Min(hi, ay.hi))
				fmt.Fprintf(&b, `<path d="M%.1f %.1fV%.1fM%.1f %.1fh8M%.1f %.1fh8" stroke="%s" fill="none"/>`+"\n", x, y0, y1, x-4, y0, x-4, y1, col)
			}
			fmt.Fprintf(&b, `<circle cx="%.1f" cy="%.1f" r="3" fill="%s"/>`+"\n", x, y, col)
		}
		if len(pts) > 1 {
			fmt.Fprintf(&b, `<polyline points="%s" fill="none" stroke="%s" stroke-width="1.5"/>`+"\n", strings.Join(pts, " "), col)
		}
		ly := top + 10 + float64(si)*18
		fmt.Fprintf(&b, `<line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="%s" stroke-width="2"/>`+"\n", left+pw+12, ly, left+pw+32, ly, col)
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f">%s</text>`+"\n", left+pw+38, ly+4, html.EscapeString(s.Name))
	}
	b.WriteString("</svg>\n")
	_, err = io.WriteString(w, b.String())
	return err
}
