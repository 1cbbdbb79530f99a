package server

import (
	"encoding/json"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
)

// TestUploadReview uploads planted-change frames plus one corrupt file and
// checks the review finds the change, lists the corrupt file and goes on.
func TestUploadReview(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 32, 24, 320, [][2]int{{240, 280}})
	files = append(files[:40], append([]upFile{{"frame40b.png", []byte("\x89PNG\r\n\x1a\nbroken")}}, files[40:]...)...)
	cr := ts.mustUpload(t, files, restartParams+`,"limit":32.5,"pace":0}`) // limit: what calibrating these params gives
	rep := waitReport(t, ts.Server, cr.ID)
	st, _ := ts.session(cr.ID)
	status := st.Status()
	if len(status.Errors) != 1 || status.Errors[0].File != "frame40b.png" || status.Errors[0].Frame != 41 || !strings.Contains(status.Errors[0].Message, "PNG") {
		t.Fatalf("errors %+v, want frame40b.png at index 41 (natural order: frame40, frame40b, frame41)", status.Errors)
	}
	if rep.Frames != 320 || len(rep.Errors) != 1 || rep.Width != 32 || rep.Height != 24 {
		t.Fatalf("report %+v", rep)
	}
	if len(rep.Alarms) == 0 {
		t.Fatalf("no alarm for the change at files frame90-frame119: %+v", rep)
	}
	a := rep.Alarms[0]
	if a.Frame < 241 || a.Frame > 260 {
		t.Fatalf("first alarm at frame %d, the change starts at index 241", a.Frame)
	}
	if len(a.Regions) == 0 || a.Regions[0].BBox[0] > 21 || a.Regions[0].BBox[2] < 16 {
		t.Fatalf("alarm regions %+v, the change is at x 16-21, y 8-13", a.Regions)
	}
	for _, p := range []string{"/alarms.csv", "/alarms.jsonl", "/stats.csv", "/report"} {
		code, b := ts.do(t, "GET", "/api/sessions/"+cr.ID+p, cr.ShareToken, "", nil)
		if code != http.StatusOK || !strings.Contains(string(b), "7") {
			t.Fatalf("GET %s: %d %q", p, code, b)
		}
	}
}

// TestReportEqualsScan reviews the same frames (one of them corrupt) and
// parameters through an upload and through `sparsewatch scan` and checks
// that the two reports are the same, timing fields aside.
func TestReportEqualsScan(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary")
	}
	bin := mustBinary(t)
	files := synthFrames(t, 32, 24, 300, [][2]int{{240, 280}})
	files = append(files, upFile{"frame300.png", []byte("GIF89a broken")})
	dir := t.TempDir()
	for _, f := range files {
		if err := os.WriteFile(filepath.Join(dir, f.name), f.data, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	out := filepath.Join(t.TempDir(), "scan.json")
	cmd := exec.Command(bin, "scan", dir, "--budget", "10%", "--top-r", "4", "--arl0", "300", "--warmup", "200",
		"--seed", "7", "--paths", "50", "--out", out)
	if msg, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("scan: %v\n%s", err, msg)
	}
	var want Report
	mustReadJSON(t, out, &want)

	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, files, `{"budget":"10%","top_r":4,"arl0":300,"reference_frames":200,"seed":7,"paths":50,"pace":0}`)
	waitReport(t, ts.Server, cr.ID)
	code, body := ts.do(t, "GET", "/api/sessions/"+cr.ID+"/report", cr.OwnerToken, "", nil)
	if code != http.StatusOK {
		t.Fatalf("report: %d %s", code, body)
	}
	var got Report
	if err := json.Unmarshal(body, &got); err != nil {
		t.Fatal(err)
	}
	for _, r := range []*Report{&got, &want} {
		r.Seconds = 0
		if r.Calibration != nil {
			r.Calibration.Seconds = 0
		}
	}
	if len(want.Alarms) == 0 || len(want.Errors) != 1 {
		t.Fatalf("scan report has %d alarms and %d errors; the test wants the planted change found and the corrupt file listed", len(want.Alarms), len(want.Errors))
	}
	if !reflect.DeepEqual(got, want) {
		g, _ := json.MarshalIndent(got, "", " ")
		w, _ := json.MarshalIndent(want, "", " ")
		t.Fatalf("session report differs from scan:\n got %s\nwant %s", g, w)
	}
}

func mustReadJSON(t *testing.T, path string, v any) {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(data, v); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
}
