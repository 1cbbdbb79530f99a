package server

import (
	"fmt"
	"net/http"
	"regexp"
	"strings"
	"testing"
	"time"
)

// externalRef finds anything that would make a browser fetch: a src or
// href to another host or scheme, a stylesheet link, a script file, a CSS
// import or url(). data: URIs are allowed.
var externalRef = regexp.MustCompile(`(?i)((src|href)\s*=\s*["']?\s*(https?:|//|file:|/)|<link\b|<script\b[^>]*\bsrc|@import|url\()`)

// TestReportHTML reviews frames with a planted episode, runs a small
// plan, and checks the HTML report: every alarm of the session in the
// table and with its picture, the plan table, and no external reference.
func TestReportHTML(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 32, 24, 300, [][2]int{{240, 280}})
	cr := ts.mustUpload(t, files, restartParams+`,"limit":32.5,"pace":0}`) // limit: as TestUploadReview
	rep := waitReport(t, ts.Server, cr.ID)
	if len(rep.Alarms) == 0 {
		t.Fatalf("no alarm for the planted episode: %+v", rep)
	}
	if c, b := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "application/json", strings.NewReader(smallPlan)); c != http.StatusAccepted {
		t.Fatalf("POST plan: %d %s", c, b)
	}
	if rec := waitPlan(t, ts, cr.ID, cr.OwnerToken, 3*time.Minute); rec.State != "done" {
		t.Fatalf("plan %s: %s", rec.State, rec.Message)
	}
	if c, _ := ts.do(t, "GET", "/api/sessions/"+cr.ID+"/report.html", "", "", nil); c != http.StatusUnauthorized {
		t.Fatalf("report.html without a token: %d, want 401", c)
	}
	code, b := ts.do(t, "GET", "/api/sessions/"+cr.ID+"/report.html?token="+cr.ShareToken, "", "", nil)
	if code != http.StatusOK {
		t.Fatalf("report.html: %d %s", code, b)
	}
	html := string(b)
	if !strings.HasPrefix(html, "<!doctype html>") || !strings.Contains(html, "</html>") {
		t.Fatalf("not a whole HTML page: %.200s", html)
	}
	if m := externalRef.FindString(html); m != "" {
		t.Fatalf("report has an external reference %q", m)
	}
	table := html[strings.Index(html, `<table id="alarms">`):]
	table = table[:strings.Index(table, "</table>")]
	for _, a := range rep.Alarms {
		cell := regexp.MustCompile(fmt.Sprintf(`<td( rowspan="\d+")?>%d</td>`, a.Frame))
		if !cell.MatchString(table) {
			t.Errorf("alarm at frame %d is not in the report's alarm table", a.Frame)
		}
		if !strings.Contains(html, fmt.Sprintf("Frame %d: regions outlined.", a.Frame)) {
			t.Errorf("alarm at frame %d has no picture", a.Frame)
		}
	}
	if n := strings.Count(html, `src="data:image/png;base64,`); n != len(rep.Alarms) {
		t.Errorf("%d inline pictures for %d alarms", n, len(rep.Alarms))
	}
	if !strings.Contains(html, "Budget plan") || !strings.Contains(html, "<td>oracle</td>") {
		t.Errorf("the plan that was run is not in the report")
	}
	t.Logf("report: %d bytes, %d alarms", len(b), len(rep.Alarms))
}
