// Package htmlreport writes a review as one self-contained HTML file: inline
// SVG chart, inline PNG snapshots, no external assets, so it can be mailed
// or archived and opened anywhere without a network.
package htmlreport

import (
	"bytes"
	"encoding/base64"
	"fmt"
	"html/template"
	"image"
	"image/color"
	"image/png"
	"io"
	"math"
	"sort"
	"strings"
	"time"

	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

// Caution is the safety text every report carries.
const Caution = "sparsewatch is a decision aid, not a certified safety, fire-detection or alarm system. " +
	"Where a missed or late alarm can hurt people or property, follow local codes and qualified, licensed practice. " +
	"Mind privacy and consent when a camera can see people."

// Point is one watched frame of the statistic chart.
type Point struct {
	Frame    int
	G, Limit float64
}

// Input is everything a report shows. Only Report is required.
type Input struct {
	Title     string
	Report    review.Report
	Series    []Point             // statistic per watched frame (may be thinned)
	Snapshots map[int]image.Image // frame at each alarm's start, keyed by alarm frame
	Plan      []PlanRow
	PlanNote  string // how the plan was made (model, runs)
	ModelNote string // bootstrap plans: the normal model's limits against the bootstrap's, and why they differ
	Generated time.Time
}

// Write renders in as HTML to w.
func Write(w io.Writer, in Input) error {
	if in.Title == "" {
		in.Title = "sparsewatch review"
	}
	if in.Generated.IsZero() {
		in.Generated = time.Now()
	}
	r := in.Report
	d := view{
		Title: in.Title, Caution: Caution, R: r,
		Generated: in.Generated.UTC().Format("2006-01-02 15:04 MST"),
		Chart:     template.HTML(chartSVG(in.Series, r.Alarms)),
		PlanNote:  in.PlanNote,
		ModelNote: in.ModelNote,
	}
	full := int64(r.Frames) * int64(r.Width) * int64(r.Height)
	if full > 0 {
		d.ReadShare = fmt.Sprintf("%.2f%%", 100*float64(r.PixelsRead)/float64(full))
	}
	d.FullPixels = full
	for _, a := range r.Alarms {
		av := alarmView{A: a, End: "still on at the end"}
		if a.EndFrame >= 0 {
			av.End = fmt.Sprint(a.EndFrame)
		}
		regs := a.Regions // at the episode's largest G
		if len(regs) == 0 {
			regs = a.StartRegions
		}
		av.Regions = regs
		if img, ok := in.Snapshots[a.Frame]; ok && img != nil {
			uri, err := snapshotURI(img, regs)
			if err != nil {
				return fmt.Errorf("htmlreport: snapshot of frame %d: %w", a.Frame, err)
			}
			av.Snapshot = template.URL(uri)
		}
		d.Alarms = append(d.Alarms, av)
	}
	plan := append([]PlanRow(nil), in.Plan...)
	sort.SliceStable(plan, func(i, j int) bool {
		if plan[i].Policy != plan[j].Policy {
			return plan[i].Policy < plan[j].Policy
		}
		return plan[i].Budget < plan[j].Budget
	})
	d.Plan = plan
	for _, p := range plan {
		d.PlanNormal = d.PlanNormal || p.NormalLimit > 0
	}
	if err := page.Execute(w, d); err != nil {
		return fmt.Errorf("htmlreport: %w", err)
	}
	return nil
}

type view struct {
	Title, Caution, Generated string
	R                         review.Report
	ReadShare                 string
	FullPixels                int64
	Chart                     template.HTML
	Alarms                    []alarmView
	Plan                      []PlanRow
	PlanNormal                bool // some row has a normal-model limit beside it
	PlanNote, ModelNote       string
}

// PlanRow is one planner result; with a bootstrap plan it also holds the
// normal model's limit for the same target and the ARL0 that limit gives
// on the bootstrap of the reference frames (0: not compared).
type PlanRow struct {
	monitor.PlanResult
	NormalLimit, NormalARL0, NormalARL0SE float64
}

type alarmView struct {
	A        review.Alarm
	End      string
	Regions  []review.Region
	Snapshot template.URL
}

// chartSVG draws G against frames with the control limit and the alarm
// episodes shaded. Coordinates are computed here so the SVG is plain.
func chartSVG(pts []Point, alarms []review.Alarm) string {
	const W, H, ml, mr, mt, mb = 760.0, 240.0, 56.0, 12.0, 12.0, 28.0
	if len(pts) == 0 {
		return `<p class="muted">No statistic series was recorded for this review.</p>`
	}
	f0, f1 := float64(pts[0].Frame), float64(pts[len(pts)-1].Frame)
	if f1 <= f0 {
		f1 = f0 + 1
	}
	ymax := 0.0
	for _, p := range pts {
		ymax = math.Max(ymax, math.Max(p.G, p.Limit))
	}
	ymax = math.Max(ymax*1.08, 1)
	x := func(f float64) float64 { return ml + (f-f0)/(f1-f0)*(W-ml-mr) }
	y := func(v float64) float64 { return mt + (1-v/ymax)*(H-mt-mb) }
	var b strings.Builder
	fmt.Fprintf(&b, `<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 %.0f %.0f" width="%.0f" height="%.0f" role="img" aria-label="statistic against control limit">`, W, H, W, H)
	for _, a := range alarms {
		end := float64(a.EndFrame)
		if a.EndFrame < 0 {
			end = f1
		}
		x0, x1 := x(float64(a.Frame)), x(end)
		fmt.Fprintf(&b, `<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="#f3c7b8"/>`, x0, mt, math.Max(x1-x0, 1.5), H-mt-mb)
	}
	fmt.Fprintf(&b, `<line x1="%.0f" y1="%.1f" x2="%.0f" y2="%.1f" stroke="#555"/>`, ml, H-mb, W-mr, H-mb)
	fmt.Fprintf(&b, `<line x1="%.0f" y1="%.1f" x2="%.0f" y2="%.1f" stroke="#555"/>`, ml, mt, ml, H-mb)
	for _, v := range []float64{0, ymax / 2, ymax} {
		fmt.Fprintf(&b, `<text x="%.0f" y="%.1f" font-size="11" text-anchor="end">%.3g</text>`, ml-4, y(v)+4, v)
	}
	fmt.Fprintf(&b, `<text x="%.0f" y="%.0f" font-size="11">frame %d</text>`, ml, H-8, pts[0].Frame)
	fmt.Fprintf(&b, `<text x="%.0f" y="%.0f" font-size="11" text-anchor="end">frame %d</text>`, W-mr, H-8, pts[len(pts)-1].Frame)
	b.WriteString(`<polyline fill="none" stroke="#1f5f8b" stroke-width="1.2" points="`)
	for _, p := range pts {
		fmt.Fprintf(&b, "%.1f,%.1f ", x(float64(p.Frame)), y(p.G))
	}
	b.WriteString(`"/><polyline fill="none" stroke="#b3261e" stroke-dasharray="5 3" points="`)
	for _, p := range pts {
		fmt.Fprintf(&b, "%.1f,%.1f ", x(float64(p.Frame)), y(p.Limit))
	}
	b.WriteString(`"/></svg>`)
	return b.String()
}

// snapshotURI returns the frame, scaled to at most 480 px wide, with each
// region's box outlined, as a PNG data URI.
func snapshotURI(img image.Image, regs []review.Region) (string, error) {
	bnd := img.Bounds()
	scale := 1
	for bnd.Dx()/scale > 480 {
		scale++
	}
	w, h := (bnd.Dx()+scale-1)/scale, (bnd.Dy()+scale-1)/scale
	out := image.NewRGBA(image.Rect(0, 0, w, h))
	for yy := 0; yy < h; yy++ {
		for xx := 0; xx < w; xx++ {
			out.Set(xx, yy, img.At(bnd.Min.X+xx*scale, bnd.Min.Y+yy*scale))
		}
	}
	box := color.RGBA{230, 60, 30, 255}
	for _, r := range regs {
		x0, y0 := r.BBox[0]/scale-1, r.BBox[1]/scale-1
		x1, y1 := r.BBox[2]/scale+1, r.BBox[3]/scale+1
		for xx := x0; xx <= x1; xx++ {
			out.Set(xx, y0, box)
			out.Set(xx, y1, box)
		}
		for yy := y0; yy <= y1; yy++ {
			out.Set(x0, yy, box)
			out.Set(x1, yy, box)
		}
	}
	var buf bytes.Buffer
	if err := png.Encode(&buf, out); err != nil {
		return "", err
	}
	return "data:image/png;base64," + base64.StdEncoding.EncodeToString(buf.Bytes()), nil
}

var page = template.Must(template.New("report").Funcs(template.FuncMap{
	"f":      func(format string, v any) string { return fmt.Sprintf(format, v) },
	"mul100": func(v float64) float64 { return 100 * v },
}).Parse(`<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>{{.Title}}</title>
<style>
body{font:14px/1.45 system-ui,sans-serif;margin:24px auto;max-width:820px;color:#1d1d1d;padding:0 12px}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:26px 0 8px;border-bottom:1px solid #ddd}
table{border-collapse:collapse;width:100%;font-size:13px} td,th{border:1px solid #ddd;padding:3px 6px;text-align:left}
th{background:#f4f4f0} .muted{color:#666} .caution{background:#fff6df;border:1px solid #e6cf8a;padding:8px 10px}
figure{margin:10px 0} figcaption{font-size:12px;color:#555} img{image-rendering:pixelated;border:1px solid #ccc}
</style></head><body>
<h1>{{.Title}}</h1>
<p class="muted">Written {{.Generated}}.</p>
<p class="caution">{{.Caution}}</p>

<h2>Parameters and calibration</h2>
<table>
<tr><th>Frames</th><td>{{.R.Frames}} ({{.R.ReferenceFrames}} reference, {{.R.FramesWatched}} watched), {{.R.Width}} x {{.R.Height}} pixels</td></tr>
<tr><th>Streams</th><td>{{.R.Streams}} ({{.R.GridWidth}} x {{.R.GridHeight}}, tile {{.R.Tile}})</td></tr>
<tr><th>Budget</th><td>{{.R.Budget}} streams per frame, policy {{.R.Policy}}</td></tr>
<tr><th>Detector</th><td>two-sided CUSUM per stream, design shift {{.R.Shift}}, sum of the top {{.R.TopR}}, compensation {{f "%.3g" .R.Compensation}}</td></tr>
<tr><th>Reference model</th><td>{{.R.Model}}</td></tr>
<tr><th>Control limit</th><td>{{f "%.4g" .R.ControlLimit}}</td></tr>
{{with .R.Calibration}}<tr><th>False-alarm target</th><td>ARL0 {{f "%.4g" .TargetARL0}} frames; calibrated ARL0 {{f "%.4g" .ARL0}} &plusmn; {{f "%.2g" .ARL0SE}}; verified on fresh paths {{f "%.4g" .VerifiedARL0}} &plusmn; {{f "%.2g" .VerifiedSE}}</td></tr>
<tr><th>Calibration model</th><td>{{.Model}}, {{.Paths}} simulated paths{{if .Extrapolated}}, tail-extrapolated{{end}}. {{.Note}}</td></tr>{{end}}
<tr><th>Pixels read</th><td>{{.R.PixelsRead}} of {{.FullPixels}} ({{.ReadShare}} of full reading); {{.R.BytesRead}} bytes taken from storage</td></tr>
</table>

<h2>Statistic against the control limit</h2>
{{.Chart}}
<p class="muted">Blue: global statistic. Red dashes: control limit. Shaded: alarm episodes.</p>

<h2>Alarms ({{len .Alarms}})</h2>
{{if .Alarms}}<table id="alarms"><tr><th>Alarm frame</th><th>Onset</th><th>End</th><th>Box (x0,y0,x1,y1)</th><th>Centroid</th><th>Area</th><th>Peak</th></tr>
{{range .Alarms}}{{$a := .}}{{range $i, $r := .Regions}}<tr>{{if eq $i 0}}<td rowspan="{{len $a.Regions}}">{{$a.A.Frame}}</td>{{end}}<td>{{$r.Onset}}</td><td>{{$a.End}}</td><td>{{index $r.BBox 0}},{{index $r.BBox 1}},{{index $r.BBox 2}},{{index $r.BBox 3}}</td><td>{{f "%.1f" (index $r.Centroid 0)}}, {{f "%.1f" (index $r.Centroid 1)}}</td><td>{{$r.Area}}</td><td>{{f "%.3g" $r.Peak}}</td></tr>
{{else}}<tr><td>{{$a.A.Frame}}</td><td colspan="6">no region above the reporting level (peak statistic {{f "%.3g" $a.A.Peak}})</td></tr>{{end}}{{end}}</table>
{{range .Alarms}}{{if .Snapshot}}<figure><img src="{{.Snapshot}}" alt="frame {{.A.Frame}} with regions"><figcaption>Frame {{.A.Frame}}: regions outlined.</figcaption></figure>{{end}}{{end}}
{{else}}<p>No alarm was raised.</p>{{end}}

{{if .Plan}}<h2>Budget plan</h2>
<p class="muted">{{.PlanNote}}</p>
<table id="plan"><tr><th>Policy</th><th>Budget</th><th>Limit</th><th>ARL0</th><th>Average delay (frames)</th>{{if .PlanNormal}}<th>Normal-model limit</th><th>Its ARL0 on the bootstrap of the reference frames</th>{{end}}</tr>
{{range .Plan}}<tr><td>{{.Policy}}</td><td>{{f "%.3g%%" (mul100 .Budget)}}</td><td>{{f "%.4g" .Limit}}</td><td>{{f "%.4g" .ARL0}} &plusmn; {{f "%.2g" .ARL0SE}}</td><td>{{if gt .ADD 0.0}}{{f "%.3g" .ADD}} &plusmn; {{f "%.2g" .ADDSE}}{{else}}none counted{{end}}</td>{{if $.PlanNormal}}{{if gt .NormalLimit 0.0}}<td>{{f "%.4g" .NormalLimit}}</td><td>{{f "%.4g" .NormalARL0}} &plusmn; {{f "%.2g" .NormalARL0SE}}</td>{{else}}<td></td><td></td>{{end}}{{end}}</tr>
{{end}}</table>
{{if .ModelNote}}<p id="model-note">{{.ModelNote}}</p>{{end}}{{end}}

{{if .R.Errors}}<h2>Inputs that could not be used</h2>
<table><tr><th>Frame</th><th>File</th><th>Reason</th></tr>{{range .R.Errors}}<tr><td>{{.Frame}}</td><td>{{.File}}</td><td>{{.Reason}}</td></tr>{{end}}</table>{{end}}
</body></html>
`))
