package htmlreport

import (
	"bytes"
	"encoding/base64"
	"fmt"
	"html"
	"image"
	"image/color"
	"image/png"
	"net/url"
	"regexp"
	"strings"
	"testing"
	"time"

	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

func sampleInput() Input {
	rep := review.Report{Width: 64, Height: 48, Streams: 3072, Budget: 92, ControlLimit: 31.5, Frames: 200,
		PixelsRead: 12345, Policy: "adaptive", Tile: 1, GridWidth: 64, GridHeight: 48, TopR: 10, Shift: 1,
		ReferenceFrames: 50, FramesWatched: 150, Model: "robust",
		Calibration: &review.Calibration{TargetARL0: 1e4, ARL0: 10100, ARL0SE: 300, VerifiedARL0: 9800, VerifiedSE: 310, Model: "normal", Paths: 200},
		Alarms: []review.Alarm{
			{Frame: 120, EndFrame: 140, Peak: 80, Regions: []review.Region{{BBox: [4]int{10, 12, 16, 18}, Centroid: [2]float64{13, 15}, Area: 40, Onset: 111, Peak: 20}}},
			{Frame: 170, EndFrame: -1, Peak: 40, Regions: []review.Region{{BBox: [4]int{40, 5, 44, 9}, Centroid: [2]float64{42, 7}, Area: 21, Onset: 166, Peak: 9}}},
		},
		Errors: []review.FileError{{Frame: 7, File: "frame007.png", Reason: "frames: truncated PNG"}},
	}
	img := image.NewGray(image.Rect(0, 0, 64, 48))
	for i := range img.Pix {
		img.Pix[i] = 90
	}
	var pts []Point
	for f := 50; f < 200; f++ {
		pts = append(pts, Point{Frame: f, G: float64(f % 37), Limit: 31.5})
	}
	return Input{Report: rep, Series: pts, Snapshots: map[int]image.Image{120: img},
		Plan:      []PlanRow{{PlanResult: monitor.PlanResult{Policy: monitor.Adaptive, Budget: 0.03, Limit: 30, ARL0: 1000, ARL0SE: 40, ADD: 19.5, ADDSE: 0.6}}},
		Generated: time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC)}
}

// TestPlanModelColumns checks a bootstrap plan's rows show the normal
// model's limit and its ARL0 beside the bootstrap's, with the note.
func TestPlanModelColumns(t *testing.T) {
	in := sampleInput()
	in.Plan[0].NormalLimit, in.Plan[0].NormalARL0, in.Plan[0].NormalARL0SE = 27.25, 612, 31
	in.ModelNote = "normal model alarms more often"
	in.Plan = append(in.Plan, PlanRow{PlanResult: monitor.PlanResult{Policy: monitor.Random, Budget: 0.03, Limit: 31, ARL0: 990, ARL0SE: 40, ADD: -1, ADDSE: -1}})
	var buf bytes.Buffer
	if err := Write(&buf, in); err != nil {
		t.Fatal(err)
	}
	doc := buf.String()
	for _, want := range []string{"<th>Normal-model limit</th>", "<td>27.25</td>", "<td>612 &plusmn; 31</td>", `<p id="model-note">normal model alarms more often</p>`, "<td>none counted</td>"} {
		if !strings.Contains(doc, want) {
			t.Errorf("report lacks %q", want)
		}
	}
}

// TestSelfContained checks the file needs nothing from outside: no element
// loads a URL (the only URL allowed is the SVG namespace name, which HTML
// never fetches, W3C SVG 1.1 section 5.1), every alarm is listed, the
// caution is there, and the snapshot is a decodable PNG (PNG spec, ISO/IEC
// 15948) with the region's box drawn in it.
func TestSelfContained(t *testing.T) {
	in := sampleInput()
	var buf bytes.Buffer
	if err := Write(&buf, in); err != nil {
		t.Fatal(err)
	}
	doc := buf.String()
	ext := regexp.MustCompile(`(?i)(src|href)\s*=\s*"(https?:|//)|<link|@import|url\(\s*['"]?https?:`)
	if m := ext.FindString(doc); m != "" {
		t.Fatalf("report refers to an external asset: %q", m)
	}
	if !strings.Contains(doc, Caution) {
		t.Error("caution text missing")
	}
	for _, a := range in.Report.Alarms {
		r := a.Regions[0]
		row := fmt.Sprintf("<td>%d,%d,%d,%d</td>", r.BBox[0], r.BBox[1], r.BBox[2], r.BBox[3])
		if !strings.Contains(doc, fmt.Sprintf(`<td rowspan="1">%d</td>`, a.Frame)) || !strings.Contains(doc, row) {
			t.Errorf("alarm at frame %d (box %s) not in the alarm table", a.Frame, row)
		}
	}
	if strings.Contains(doc, "Normal-model limit") {
		t.Error("a normal-model column without a bootstrap plan")
	}
	if !strings.Contains(doc, "still on at the end") || !strings.Contains(doc, "frame007.png") || !strings.Contains(doc, "19.5") {
		t.Error("open episode, file error or plan row missing")
	}
	m := regexp.MustCompile(`src="data:image/png;base64,([^"]+)"`).FindStringSubmatch(doc)
	if m == nil {
		t.Fatal("no inline PNG snapshot")
	}
	// html/template writes '+' as an HTML entity in attributes.
	b64, err := url.PathUnescape(html.UnescapeString(m[1]))
	if err != nil {
		t.Fatal(err)
	}
	raw, err := base64.StdEncoding.DecodeString(b64)
	if err != nil {
		t.Fatal(err)
	}
	img, err := png.Decode(bytes.NewReader(raw))
	if err != nil {
		t.Fatalf("snapshot is not a PNG: %v", err)
	}
	// The box of the first region is outlined one pixel outside its bbox.
	if c := color.RGBAModel.Convert(img.At(9, 15)).(color.RGBA); c.R < 200 || c.G > 100 {
		t.Errorf("box outline missing at (9,15): %v", c)
	}
	if c := color.RGBAModel.Convert(img.At(13, 15)).(color.RGBA); c.R != 90 {
		t.Errorf("inside of the box changed: %v", c)
	}
}

func TestEmptyReview(t *testing.T) {
	var buf bytes.Buffer
	if err := Write(&buf, Input{Report: review.Report{Width: 4, Height: 4}}); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(buf.String(), "No alarm was raised") || !strings.Contains(buf.String(), "No statistic series") {
		t.Error("empty review does not say there is nothing")
	}
}
