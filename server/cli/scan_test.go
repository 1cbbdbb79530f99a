package cli

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"image"
	"image/png"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"sparsewatch/frames"
	"sparsewatch/server/review"
)

// writeSynthetic writes sp's frames as 16-bit PNGs named frame0.png ...
// (natural order matters: frame10 after frame9) and returns the folder.
func writeSynthetic(t *testing.T, sp frames.Synthetic) string {
	t.Helper()
	dir := t.TempDir()
	var f frames.Frame
	for i := 0; i < sp.Frames; i++ {
		sp.Render(i, &f)
		img := image.NewGray16(image.Rect(0, 0, f.Width, f.Height))
		for k, v := range f.Pix {
			u := uint16(min(max(v, 0), 65535))
			img.Pix[2*k], img.Pix[2*k+1] = uint8(u>>8), uint8(u)
		}
		var b bytes.Buffer
		png.Encode(&b, img)
		os.WriteFile(filepath.Join(dir, fmt.Sprintf("frame%d.png", i)), b.Bytes(), 0o644)
	}
	return dir
}

func runCmd(t *testing.T, stdin []byte, args ...string) (string, string, error) {
	t.Helper()
	var out, errb bytes.Buffer
	err := runScan(context.Background(), Env{Stdin: bytes.NewReader(stdin), Stdout: &out, Stderr: &errb}, args)
	return out.String(), errb.String(), err
}

func TestScanReportContract(t *testing.T) {
	sp := frames.Synthetic{Width: 20, Height: 16, Frames: 90, Level: 1000, Noise: 10, Seed: 9, ChangeFrame: 60, CX: 12, CY: 7, Radius: 2.5, Delta: 60}
	dir := writeSynthetic(t, sp)
	os.WriteFile(filepath.Join(dir, "frame70.png"), []byte("not a png"), 0o644) // replaces a good frame
	os.WriteFile(filepath.Join(dir, "notes.txt"), []byte("skip me"), 0o644)
	alarms := filepath.Join(t.TempDir(), "alarms.csv")
	stats := filepath.Join(t.TempDir(), "stats.csv")
	// A fixed limit keeps the test fast; calibration is tested in review.
	html := filepath.Join(t.TempDir(), "report.html")
	out, stderr, err := runCmd(t, nil, dir, "--budget", "20%", "--warmup", "30", "--limit", "250", "--alarms", alarms, "--stats", stats, "--report", html)
	if err != nil {
		t.Fatalf("scan: %v\n%s", err, stderr)
	}
	if stderr != "" {
		t.Errorf("stderr not a terminal, yet scan printed %q", stderr)
	}
	var rep map[string]any
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("report is not JSON: %v\n%s", err, out)
	}
	for _, k := range []string{"width", "height", "streams", "budget", "control_limit", "frames", "pixels_read", "alarms", "bytes_read", "errors"} {
		if _, ok := rep[k]; !ok {
			t.Errorf("report lacks %q", k)
		}
	}
	var r review.Report
	json.Unmarshal([]byte(out), &r)
	if r.Width != 20 || r.Height != 16 || r.Streams != 320 || r.Budget != 64 || r.Frames != 89 {
		t.Errorf("report header %+v", r)
	}
	if len(r.Errors) != 1 || r.Errors[0].File != "frame70.png" || r.Errors[0].Frame != 70 {
		t.Errorf("errors %+v, want frame70.png at frame 70", r.Errors)
	}
	if len(r.Skipped) != 1 || r.Skipped[0] != "notes.txt" {
		t.Errorf("skipped %v", r.Skipped)
	}
	if len(r.Alarms) == 0 || r.Alarms[0].Frame < 60 {
		t.Fatalf("alarms %+v, want the first at or after frame 60", r.Alarms)
	}
	b := r.Alarms[0].Regions[0].BBox
	if !(b[0] <= 12 && 12 <= b[2] && b[1] <= 7 && 7 <= b[3]) {
		t.Errorf("first region %v misses (12,7)", b)
	}
	rows := readCSV(t, alarms)
	if len(rows) != len(r.Alarms)+1 || rows[0][1] != "frame" || rows[1][1] != fmt.Sprint(r.Alarms[0].Frame) {
		t.Errorf("alarms.csv %v", rows)
	}
	if b, err := os.ReadFile(html); err != nil || !strings.Contains(string(b), "<html") {
		t.Errorf("HTML report: %v (%d bytes)", err, len(b))
	}
	srows := readCSV(t, stats)
	if strings.Join(srows[0], ",") != "frame,G,limit,pixels_read" || len(srows) != 1+r.FramesWatched || srows[1][0] != "30" || srows[1][3] != "64" {
		t.Errorf("stats.csv head %v, %d rows", srows[:2], len(srows))
	}
}

func TestScanCompareAndStdin(t *testing.T) {
	sp := frames.Synthetic{Width: 16, Height: 12, Frames: 60, Level: 500, Noise: 5, Seed: 2, ChangeFrame: 40, CX: 4, CY: 4, Radius: 2, Delta: 40}
	dir := writeSynthetic(t, sp)
	var stream bytes.Buffer
	for i := 0; i < sp.Frames; i++ {
		b, _ := os.ReadFile(filepath.Join(dir, fmt.Sprintf("frame%d.png", i)))
		stream.Write(b)
	}
	truth := filepath.Join(t.TempDir(), "truth.json")
	os.WriteFile(truth, []byte(`{"change_frame":40,"end_frame":-1,"centre":[4,4]}`), 0o644)
	out, stderr, err := runCmd(t, stream.Bytes(), "-", "--warmup", "20", "--limit", "40", "--compare", "adaptive,random,full", "--truth", truth)
	if err != nil {
		t.Fatalf("scan -: %v\n%s", err, stderr)
	}
	for _, want := range []string{"adaptive", "random", "full", "delay", "truth: change from frame 40"} {
		if !strings.Contains(out, want) {
			t.Errorf("table lacks %q:\n%s", want, out)
		}
	}
	// full reads every pixel of the 40 watched frames.
	if !strings.Contains(out, fmt.Sprint(60*16*12)) {
		t.Errorf("full's pixels read (%d) not in the table:\n%s", 60*16*12, out)
	}
}

func TestScanBadArguments(t *testing.T) {
	if _, _, err := runCmd(t, nil); err == nil {
		t.Error("scan with no folder succeeded")
	}
	if _, _, err := runCmd(t, nil, t.TempDir()); err == nil || !strings.Contains(err.Error(), "no frame files") {
		t.Errorf("empty folder: %v", err)
	}
	if _, _, err := runCmd(t, nil, t.TempDir(), "--budget", "3x"); err == nil || !strings.Contains(err.Error(), "budget") {
		t.Errorf("bad budget: %v", err)
	}
}

func readCSV(t *testing.T, path string) [][]string {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	return rows
}

// TestScanDemoScenarios is the end-to-end check of the demo scenarios with
// the default settings (3% budget, ARL0 10^4, self-start model): demo, then
// scan; the first alarm after the change holds the truth centre in its box
// and at most one alarm comes before the change. Calibration at these sizes
// takes minutes, so it runs with SPARSEWATCH_LONG=1 only:
//
//	SPARSEWATCH_LONG=1 go test -count=1 -run TestScanDemoScenarios -v ./server/cli/
func TestScanDemoScenarios(t *testing.T) {
	if os.Getenv("SPARSEWATCH_LONG") == "" {
		t.Skip("long: set SPARSEWATCH_LONG=1 (a few minutes)")
	}
	for _, name := range []string{"furnace", "starfield"} {
		t.Run(name, func(t *testing.T) {
			dir := filepath.Join(t.TempDir(), name)
			var out, errb bytes.Buffer
			if err := runDemo(context.Background(), Env{Stdout: &out, Stderr: &errb}, []string{"--scenario", name, "--out", dir}); err != nil {
				t.Fatalf("demo: %v %s", err, errb.String())
			}
			truth, err := readTruth(filepath.Join(dir, "truth.json"))
			if err != nil {
				t.Fatal(err)
			}
			js, stderr, err := runCmd(t, nil, dir, "--budget", "3%", "--arl0", "10000")
			if err != nil {
				t.Fatalf("scan: %v\n%s", err, stderr)
			}
			var rep review.Report
			if err := json.Unmarshal([]byte(js), &rep); err != nil {
				t.Fatal(err)
			}
			before := 0
			var first *review.Alarm
			for i := range rep.Alarms {
				a := &rep.Alarms[i]
				if a.Frame < truth.ChangeFrame {
					before++
				} else if first == nil {
					first = a
				}
			}
			if before > 1 || first == nil || len(first.Regions) == 0 {
				t.Fatalf("%d alarms before the change at %d; first after it: %+v", before, truth.ChangeFrame, first)
			}
			b, cx, cy := first.Regions[0].BBox, truth.Centre[0], truth.Centre[1]
			if !(float64(b[0]) <= cx && cx <= float64(b[2]) && float64(b[1]) <= cy && cy <= float64(b[3])) {
				t.Errorf("first region %v misses the centre (%v, %v)", b, cx, cy)
			}
			t.Logf("%s: limit %.2f, alarm at %d (delay %d), box %v, %d pixels read of %d frames x %d", name, rep.ControlLimit,
				first.Frame, first.Frame-truth.ChangeFrame, b, rep.PixelsRead, rep.Frames, rep.Width*rep.Height)
		})
	}
}
