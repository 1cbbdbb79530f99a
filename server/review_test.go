package server

import (
	"net/http"
	"strings"
	"testing"
)

// TestUploadReview uploads planted-change frames plus one corrupt file and
// checks the review finds the change, lists the corrupt file and goes on.
func TestUploadReview(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 32, 24, 320, [][2]int{{240, 280}})
	files = append(files[:40], append([]upFile{{"frame40b.png", []byte("\x89PNG\r\n\x1a\nbroken")}}, files[40:]...)...)
	cr := ts.mustUpload(t, files, restartParams+`,"pace":0}`)
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
