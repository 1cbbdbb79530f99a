package web_test

import (
	"bytes"
	"context"
	"encoding/binary"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io"
	"log/slog"
	"math"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"sparsewatch/server"
	"sparsewatch/web"
)

const chromiumPath = "/usr/bin/chromium"

// newBrowser starts a fresh headless chromium (BROWSER.md recipe) and
// returns its first tab; extra options (camera flags) are added to the
// recipe's. The browser log is printed only if the test fails.
func newBrowser(t testing.TB, timeout time.Duration, extra ...chromedp.ExecAllocatorOption) context.Context {
	t.Helper()
	if _, err := os.Stat(chromiumPath); err != nil {
		t.Skipf("browser tests need Debian's chromium at %s (apt-get install chromium): %v", chromiumPath, err)
	}
	var logBuf bytes.Buffer
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromiumPath), chromedp.Headless, chromedp.NoSandbox,
		chromedp.DisableGPU, chromedp.NoFirstRun, chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.WindowSize(1280, 900),
		chromedp.UserDataDir(t.TempDir()), chromedp.Env("TMPDIR=" + t.TempDir()),
		chromedp.CombinedOutput(&logBuf),
	}
	opts = append(opts, extra...)
	base, stop := context.WithTimeout(context.Background(), timeout)
	alloc, stopAlloc := chromedp.NewExecAllocator(base, opts...)
	tab, stopTab := chromedp.NewContext(alloc)
	if err := chromedp.Do(tab, chromedp.EmulateViewport(1280, 900)); err != nil {
		stopTab()
		stopAlloc()
		stop()
		t.Fatalf("start chromium: %v\n%s", err, logBuf.String())
	}
	t.Cleanup(func() {
		stopTab()
		stopAlloc()
		stop()
		if t.Failed() {
			t.Logf("chromium log (dbus noise left out):\n%s", tail(withoutDbus(logBuf.String()), 4000))
		}
	})
	return tab
}

// newTestServer starts a server with a fresh data folder on 127.0.0.1 (a
// secure context, so getUserMedia works over plain http) for one test; it
// may fetch camera URLs under allowCameraURL.
func newTestServer(t *testing.T, allowCameraURL ...string) *httptest.Server {
	t.Helper()
	srv, err := server.New(server.Options{DataDir: t.TempDir(), AllowCameraURL: allowCameraURL,
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(srv.Handler())
	t.Cleanup(func() { ts.Close(); srv.Close() })
	srv.SetBaseURL(ts.URL)
	return ts
}

// withoutDbus drops chromium's harmless "Failed to connect to the bus" lines.
func withoutDbus(s string) string {
	var b strings.Builder
	for _, l := range strings.Split(s, "\n") {
		if !strings.Contains(l, "dbus") {
			b.WriteString(l + "\n")
		}
	}
	return b.String()
}

func tail(s string, n int) string {
	if len(s) > n {
		return "…" + s[len(s)-n:]
	}
	return s
}

// shot writes a screenshot of the tab to $SPARSEWATCH_SHOTS/name.png when
// that variable names a folder; the suite takes none by default.
func shot(t *testing.T, tab context.Context, name string) {
	t.Helper()
	dir := os.Getenv("SPARSEWATCH_SHOTS")
	if dir == "" {
		return
	}
	chromedp.Run(tab, chromedp.Evaluate[bool](`window.scrollTo(0, 0), true`))
	capture := chromedp.CaptureScreenshot()
	if strings.HasSuffix(name, "-page") {
		capture = chromedp.FullScreenshot(100) // the whole page, PNG
	}
	png, err := chromedp.Run(tab, capture)
	if err != nil {
		t.Logf("screenshot %s: %v", name, err)
		return
	}
	if err := os.MkdirAll(dir, 0o755); err == nil {
		os.WriteFile(filepath.Join(dir, name+".png"), png, 0o644)
	}
}

// poll waits until the JS expression is truthy and returns its value.
func poll[T any](t *testing.T, tab context.Context, what, expr string, timeout time.Duration) T {
	t.Helper()
	deadline := time.Now().Add(timeout)
	var v T
	var err error
	for {
		v, err = chromedp.Run(tab, chromedp.Poll[T](expr,
			chromedp.WithPollingInterval(50*time.Millisecond), chromedp.WithPollingTimeout(time.Until(deadline))))
		// A navigation (upload -> owner view) ends the poll; poll the new page.
		if err == nil || time.Now().After(deadline) || !(strings.Contains(err.Error(), "navigated") || strings.Contains(err.Error(), "Cannot find context")) {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	if err != nil {
		state, _ := chromedp.Run(tab, chromedp.Evaluate[string](`JSON.stringify(document.body.dataset)`))
		t.Fatalf("waiting for %s: %v\npage state: %s", what, err, state)
	}
	return v
}

func eval[T any](t testing.TB, tab context.Context, expr string) T {
	t.Helper()
	v, err := chromedp.Run(tab, chromedp.Evaluate[T](expr))
	if err != nil {
		t.Fatalf("evaluate %s: %v", strings.TrimSpace(expr), err)
	}
	return v
}

// Planted change of the test frames: a bright square appears at frame
// changeFrame and stays to the end.
const (
	testW, testH    = 32, 24 // small: calibration time grows with the stream count
	testFrames      = 280    // the alarm stays on from about frame 150 to the end
	testRef         = 60
	changeFrame     = 120
	spotX0, spotY0  = 20, 10
	spotSide        = 4
	noiseSigma      = 300  // counts of a 16-bit frame: rounding to integers is negligible
	spotRise        = 2400 // 8 noise sigma per pixel, 16 per 2 x 2 tile
	regionTolerance = 3    // pixels a found box may miss the planted one by
)

// writeFrames writes testFrames 16-bit grey PNGs: a gradient with Gaussian
// noise, and from changeFrame on a bright square. Names count from 1 with
// no zero padding, so the server's natural sort order is exercised too.
func writeFrames(t *testing.T) []string {
	t.Helper()
	dir := t.TempDir()
	rng := rand.New(rand.NewPCG(7, 11))
	var paths []string
	for f := 0; f < testFrames; f++ {
		img := image.NewGray16(image.Rect(0, 0, testW, testH))
		for y := 0; y < testH; y++ {
			for x := 0; x < testW; x++ {
				v := 20000 + 300*float64(x) + 150*float64(y) + rng.NormFloat64()*noiseSigma
				if f >= changeFrame && x >= spotX0 && x < spotX0+spotSide && y >= spotY0 && y < spotY0+spotSide {
					v += spotRise
				}
				img.SetGray16(x, y, color.Gray16{Y: uint16(math.Max(0, math.Min(65535, math.Round(v))))})
			}
		}
		var buf bytes.Buffer
		if err := png.Encode(&buf, img); err != nil {
			t.Fatal(err)
		}
		p := filepath.Join(dir, fmt.Sprintf("frame%d.png", f+1))
		if err := os.WriteFile(p, buf.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
		paths = append(paths, p)
	}
	// One broken file last: the page must list it while the review goes on.
	bad := filepath.Join(dir, fmt.Sprintf("frame%d.png", testFrames+1))
	if err := os.WriteFile(bad, []byte("\x89PNG\r\n\x1a\nnot really"), 0o644); err != nil {
		t.Fatal(err)
	}
	return append(paths, bad)
}

// fixedLimit is the control limit the test asks for: "" (calibrate from
// the target, about 3 s) normally; under the race detector calibration
// takes minutes, so a limit near what it finds for these frames (87 for
// ARL0 500) is given instead.
func fixedLimit() string {
	if raceEnabled {
		return `"90"`
	}
	return `""`
}

// TestWatchUploadShare drives the page as a user would: upload a folder of
// frames through the file input, watch the review, see the alarm on the
// chart and its region on the frame view, then open the share link in a
// second tab that follows the same frames and cannot change anything.
func TestWatchUploadShare(t *testing.T) {
	paths := writeFrames(t)
	ts := newTestServer(t)

	tab := newBrowser(t, 90*time.Second)
	if err := chromedp.Do(tab, chromedp.Navigate(ts.URL+"/")); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, tab, "the start page", `document.body.dataset.state === "home"`, 5*time.Second)
	shot(t, tab, "1-start")
	checkFrameDecoding(t, tab)
	// Settings for the new session, then the files.
	eval[bool](t, tab, fmt.Sprintf(`(() => {
		const f = document.getElementById("new-settings");
		f.open = true;
		f.querySelector("[name=reference_frames]").value = %d;
		f.querySelector("[name=budget]").value = "10%%";
		f.querySelector("[name=arl0]").value = 500;
		f.querySelector("[name=tile]").value = 2;
		f.querySelector("[name=pace]").value = 30;
		f.querySelector("[name=limit]").value = %s;
		return true; })()`, testRef, fixedLimit()))
	// Files dropped on the drop area are picked too (a synthetic drop of
	// two small files; the file input below replaces them).
	dropped, err := chromedp.Run(tab, chromedp.Evaluate[string](`(() => {
		const dt = new DataTransfer();
		dt.items.add(new File(["a"], "a1.png", {type: "image/png"}));
		dt.items.add(new File(["bb"], "a2.png", {type: "image/png"}));
		document.getElementById("drop").dispatchEvent(new DragEvent("drop", {dataTransfer: dt, bubbles: true, cancelable: true}));
		return new Promise((ok) => setTimeout(() => ok(document.body.dataset.picked), 100)); })()`, chromedp.EvalAwaitPromise))
	if err != nil || dropped != "2" {
		t.Errorf("after dropping 2 files the page has %q picked (%v)", dropped, err)
	}
	if err := chromedp.Do(tab, chromedp.SetUploadFiles(chromedp.CSS("#files"), paths)); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, tab, "the picked files", fmt.Sprintf(`document.body.dataset.picked === "%d"`, len(paths)), 5*time.Second)
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS("#send"))); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, tab, "the owner view", `location.pathname.startsWith("/watch/") && document.body.dataset.role === "owner"`, 10*time.Second)
	poll[bool](t, tab, "the first watched frame", `["watching", "alarm"].includes(document.body.dataset.state)`, 40*time.Second)
	shot(t, tab, "2-first-frames")

	// The false-alarm target as "one per N hours at F frames per second"
	// is turned into frames in the page: 2.5 h * 3600 s/h * 4 frames/s.
	got := eval[string](t, tab, `(() => {
		const q = (n) => document.querySelector("#settings [name='" + n + "']");
		document.querySelector("#settings [name='arl0-mode'][value=hours]").checked = true;
		q("hours").value = "2.5"; q("fps").value = "4";
		q("fps").dispatchEvent(new Event("input", {bubbles: true}));
		return document.body.dataset.arl0; })()`)
	if want := fmt.Sprint(2.5 * 3600 * 4); got != want {
		t.Errorf("target of one false alarm per 2.5 hours at 4 frames/s shows as %s frames, want %s", got, want)
	}
	// The share link, opened in a second tab of the same browser.
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS("#share"))); err != nil {
		t.Fatal(err)
	}
	shareURL := poll[string](t, tab, "the share link", `document.body.dataset.shareUrl || ""`, 5*time.Second)
	if !strings.Contains(shareURL, "/share/") {
		t.Fatalf("share link %q does not point at /share/", shareURL)
	}
	viewer, stopViewer := chromedp.NewContext(tab)
	defer stopViewer()
	if err := chromedp.Do(viewer, chromedp.Navigate(shareURL)); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, viewer, "the viewer's first frame", `document.body.dataset.role === "viewer" && +document.body.dataset.frame >= 0`, 10*time.Second)
	f1 := eval[int](t, viewer, `+document.body.dataset.frame`)
	f2 := poll[int](t, viewer, "the viewer's frames to advance", fmt.Sprintf(`+document.body.dataset.frame > %d && +document.body.dataset.frame`, f1), 10*time.Second)
	ownerNow := eval[int](t, tab, `+document.body.dataset.frame`)
	viewerNow := eval[int](t, viewer, `+document.body.dataset.frame`)
	// Both follow the one review: the latest frames are close (frame
	// updates are sent at most 30 a second, latest wins).
	if d := ownerNow - viewerNow; d < -10 || d > 10 {
		t.Errorf("owner at frame %d, viewer at frame %d: they should follow the same review", ownerNow, viewerNow)
	}
	t.Logf("viewer frames %d -> %d; owner %d, viewer %d", f1, f2, ownerNow, viewerNow)

	// The alarm: listed, shaded on the chart, its region outlined on the
	// frame view. Probe the canvas in the same turn as the drawing it
	// describes (drawnRegions is set by the draw), once an alarm that began
	// after the planted change is on.
	probe := poll[map[string]any](t, tab, "the alarm", fmt.Sprintf(`(() => {
		const d = document.body.dataset;
		const regs = JSON.parse(d.drawnRegions || "[]");
		const cur = +d.drawn;
		const starts = [...sparsewatch.state.alarms.keys()].filter((f) => f <= cur);
		if (d.state !== "alarm" || regs.length === 0 || cur < %d || starts.length === 0) return false;
		const c = document.getElementById("view"), ctx = c.getContext("2d");
		const px = (x, y) => Array.from(ctx.getImageData(Math.round(x), Math.round(y), 1, 1).data);
		// The outlined region that meets the planted square, if any.
		const r = regs.find((b) => b[2] >= %d && b[0] <= %d && b[3] >= %d && b[1] <= %d);
		if (!r) return false;
		const [x0, y0] = sparsewatch.toCanvas(r[0], r[1]);
		const [x1, y1] = sparsewatch.toCanvas(r[2] + 1, r[3] + 1);
		const ym = (y0 + y1) / 2, xm = (x0 + x1) / 2;
		// The outline is 2 device px wide just outside the box; probe the middle of each side.
		return {alarm: Math.max(...starts), box: r, left: px(x0 - 1.5, ym), right: px(x1 + 0.5, ym), top: px(xm, y0 - 1.5),
			far: px(Math.min(x0, x1) - 40, ym + 40), all: [...sparsewatch.state.alarms.keys()]};
	})()`, changeFrame, spotX0-regionTolerance, spotX0+spotSide-1+regionTolerance,
		spotY0-regionTolerance, spotY0+spotSide-1+regionTolerance), 40*time.Second)
	alarmFrame := int(probe["alarm"].(float64))
	t.Logf("alarms starting at frames %v", probe["all"])
	shot(t, tab, "4-alarm")
	box := toInts(probe["box"])
	t.Logf("region %v (meets the planted square) in the alarm of frame %d", box, alarmFrame)
	traffic := eval[[]int](t, tab, `[+document.body.dataset.bytesIn, +document.body.dataset.frameUpdates]`)
	t.Logf("owner tab so far: %d binary bytes, %d frame updates (%d bytes per update, previews included)", traffic[0], traffic[1], traffic[0]/max(traffic[1], 1))
	for _, side := range []string{"left", "right", "top"} {
		if c := toInts(probe[side]); !near(c, regionRGB, 40) {
			t.Errorf("canvas pixel on the %s side of the region outline is %v, want about %v", side, c, regionRGB)
		}
	}
	if c := toInts(probe["far"]); near(c, regionRGB, 40) {
		t.Errorf("canvas pixel away from the region is %v, the outline colour: the probe cannot tell", c)
	}
	// Zoom to pixels: one source pixel becomes 16 screen pixels, centred on the region.
	eval[bool](t, tab, `document.getElementById("zoom-px").click(), true`)
	scale := eval[float64](t, tab, `(() => { const a = sparsewatch.toCanvas(0, 0), b = sparsewatch.toCanvas(1, 0); return (b[0] - a[0]) / devicePixelRatio; })()`)
	if scale != 16 {
		t.Errorf("after \"pixels\" one source pixel spans %v screen pixels, want 16", scale)
	}
	shot(t, tab, "4a-zoom")
	eval[bool](t, tab, `document.getElementById("zoom-fit").click(), true`)
	// Chart: the alarm episode is shaded; a watched frame before it is not.
	shade := eval[map[string]any](t, tab, fmt.Sprintf(`(() => {
		const c = document.getElementById("chart"), ctx = c.getContext("2d");
		const col = (f) => { const x = Math.round(sparsewatch.chartX(f)) + 1; const out = [];
			for (let y = 15; y < c.height - 30; y += 7) out.push(Array.from(ctx.getImageData(x, y, 1, 1).data));
			return out; };
		return {alarm: col(%d), before: col(%d)}; })()`, alarmFrame, testRef+5))
	if n := countNear(shade["alarm"], episodeRGB, 14); n < 3 {
		t.Errorf("chart column at the alarm frame has %d shaded pixels, want several", n)
	}
	if n := countNear(shade["before"], episodeRGB, 14); n != 0 {
		t.Errorf("chart column before the alarm has %d alarm-shaded pixels, want none", n)
	}
	// Clicking the chart at the alarm picks that frame and its alarm.
	xy := eval[[]float64](t, tab, fmt.Sprintf(`(() => { const r = document.getElementById("chart").getBoundingClientRect();
		return [r.left + sparsewatch.chartX(%d) / devicePixelRatio + 1, r.top + r.height / 2]; })()`, alarmFrame))
	if err := chromedp.Do(tab, chromedp.MouseClickXY(xy[0], xy[1])); err != nil {
		t.Fatal(err)
	}
	picked := poll[string](t, tab, "the picked alarm", `document.body.dataset.pickedAlarm || ""`, 3*time.Second)
	if picked != fmt.Sprint(alarmFrame) {
		t.Errorf("clicking the chart at frame %d picked the alarm of frame %s", alarmFrame, picked)
	}
	// The PNG picture made in the page, and the alarm
	// list download behind the page's link.
	eval[bool](t, tab, `document.getElementById("snapshot").click(), true`)
	if n := poll[int](t, tab, "the PNG picture", `+document.body.dataset.snapshot || 0`, 5*time.Second); n < 100 {
		t.Errorf("PNG picture of the frame is %d bytes", n)
	}
	csv, err := chromedp.Run(tab, chromedp.Evaluate[string](`fetch(document.getElementById("dl-csv").href).then(r => r.text())`, chromedp.EvalAwaitPromise))
	if err != nil || !strings.Contains(csv, "\n"+fmt.Sprint(alarmFrame)+",") {
		t.Errorf("alarms CSV from the page's link (%v) has no row for frame %d:\n%.300s", err, alarmFrame, csv)
	}
	shot(t, tab, "4b-picked-alarm")
	// The viewer has no working controls, and a write with its token is refused.
	ctl := eval[map[string]any](t, viewer, `(() => ({
		fieldsDisabled: document.getElementById("settings-fields").disabled,
		applyShown: document.getElementById("apply").offsetParent !== null,
		compareShown: document.getElementById("compare").offsetParent !== null,
		shareShown: document.getElementById("share").offsetParent !== null,
		budgetDisabled: document.querySelector("#settings [name=budget]").matches(":disabled"),
	}))()`)
	for k, want := range map[string]bool{"fieldsDisabled": true, "applyShown": false, "compareShown": false, "shareShown": false, "budgetDisabled": true} {
		if ctl[k] != want {
			t.Errorf("viewer tab: %s = %v, want %v", k, ctl[k], want)
		}
	}
	code, err := chromedp.Run(viewer, chromedp.Evaluate[int](`fetch("/api/sessions/" + document.body.dataset.session + "/params", {
		method: "PATCH", headers: {"Authorization": "Bearer " + sparsewatch.state.token, "Content-Type": "application/json"},
		body: JSON.stringify({budget: "50%"})}).then(r => r.status)`, chromedp.EvalAwaitPromise))
	if err != nil || code != http.StatusForbidden {
		t.Errorf("PATCH params with the share token: status %d (%v), want 403", code, err)
	}
	shot(t, viewer, "3-share-tab")

	// The viewer sees the same alarm.
	vAlarm := poll[int](t, viewer, "the alarm in the viewer tab", `sparsewatch.state.alarms.size > 0 && Math.min(...sparsewatch.state.alarms.keys()) + 1`, 10*time.Second) - 1
	if vAlarm != alarmFrame {
		t.Errorf("viewer lists the first alarm at frame %d, owner at %d", vAlarm, alarmFrame)
	}
	shot(t, viewer, "5-share-alarm")
	shot(t, viewer, "5-share-alarm-page")
	poll[bool](t, tab, "the end of the review", `document.body.dataset.state === "finished"`, 30*time.Second)
	shot(t, tab, "6-finished")
	// The broken file is listed by name; the review went on without it.
	if txt := eval[string](t, tab, `document.body.dataset.fileErrors + " " + document.getElementById("file-errors").textContent`); !strings.HasPrefix(txt, "1 ") ||
		!strings.Contains(txt, fmt.Sprintf("frame%d.png", testFrames+1)) {
		t.Errorf("problems shown for the upload with one broken file: %q", txt)
	}
	// After the review, clicking the chart asks the server for that frame
	// (seek) and its picture is shown.
	xy = eval[[]float64](t, tab, fmt.Sprintf(`(() => { const r = document.getElementById("chart").getBoundingClientRect();
		return [r.left + sparsewatch.chartX(%d) / devicePixelRatio + 0.5, r.top + r.height / 2]; })()`, changeFrame-20))
	if err := chromedp.Do(tab, chromedp.MouseClickXY(xy[0], xy[1])); err != nil {
		t.Fatal(err)
	}
	pickedFrame := poll[int](t, tab, "the picked frame", `document.body.dataset.picked !== undefined && +document.body.dataset.picked`, 3*time.Second)
	if d := pickedFrame - (changeFrame - 20); d < -1 || d > 1 {
		t.Errorf("clicked the chart at frame %d, the page picked %d", changeFrame-20, pickedFrame)
	}
	poll[bool](t, tab, "the picked frame's picture", fmt.Sprintf(`document.body.dataset.preview === "%d"`, pickedFrame), 5*time.Second)
	shot(t, tab, "6-finished-page")

	// Compare: the same frames with the random policy, shown beside this
	// session's own run, each with its statistic drawn.
	eval[bool](t, tab, `(() => { for (const cb of document.querySelectorAll("#compare-policies input")) cb.checked = cb.value === "random";
		document.getElementById("compare").click(); return true; })()`)
	runs := poll[int](t, tab, "the compare runs", `+document.body.dataset.compareRuns || 0`, 60*time.Second)
	cards := eval[[]string](t, tab, `Array.from(document.querySelectorAll("#compare-out .run h3")).map((h) => h.textContent)`)
	drawn := eval[int](t, tab, `Array.from(document.querySelectorAll("#compare-out canvas")).filter((c) => {
		const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
		for (let i = 3; i < d.length; i += 4) if (d[i] > 0) return true;
		return false; }).length`)
	if runs != 2 || len(cards) != 2 || cards[0] != "adaptive" || cards[1] != "random" || drawn != 2 {
		t.Errorf("compare shows %d runs, cards %v, %d charts drawn; want adaptive and random, both drawn", runs, cards, drawn)
	}
	shot(t, tab, "6b-compare-page")
	// The owner's controls work: a new budget is applied and the review
	// starts again from frame 0 with it.
	eval[bool](t, tab, `(() => { document.querySelector("#settings [name=budget]").value = "20%";
		document.querySelector("#settings [name='arl0-mode'][value=frames]").checked = true;
		document.getElementById("apply").click(); return true; })()`)
	msg := poll[string](t, tab, "an answer to Apply", `(() => { const m = document.getElementById("settings-msg").textContent;
		return m !== "Sending…" && m; })()`, 10*time.Second)
	if !strings.HasPrefix(msg, "Applied") {
		t.Fatalf("Apply answered %q", msg)
	}
	budget, err := chromedp.Run(tab, chromedp.Evaluate[string](`fetch("/api/sessions/" + document.body.dataset.session,
		{headers: {"Authorization": "Bearer " + sparsewatch.state.token}}).then(r => r.json()).then(s => s.params.budget)`, chromedp.EvalAwaitPromise))
	if err != nil || budget != "20%" {
		t.Errorf("after Apply the session's budget is %q (%v), want 20%%", budget, err)
	}
	poll[bool](t, tab, "the review to start again", `document.body.dataset.state !== "finished" && +document.body.dataset.frame < 279`, 10*time.Second)

	// Back on the start page, the session is listed with its owner link
	// (kept in this browser), and the demo scenes are offered.
	id := eval[string](t, tab, `document.body.dataset.session`)
	if err := chromedp.Do(tab, chromedp.Navigate(ts.URL+"/")); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, tab, "the session in the list", fmt.Sprintf(`!!document.querySelector("#sessions a[href*='/watch/%s']")`, id), 5*time.Second)
	poll[bool](t, tab, "the demo scenes", `document.getElementById("demo-scenario").options.length > 0`, 5*time.Second)
	shot(t, tab, "7-start-again")
}

// Colours the page draws with (style.css / app.js COLORS).
var (
	regionRGB  = []int{255, 77, 46}
	episodeRGB = []int{255, 223, 216} // rgba(255,77,46,0.22) over white
)

func toInts(v any) []int {
	a, _ := v.([]any)
	out := make([]int, len(a))
	for i, x := range a {
		f, _ := x.(float64)
		out[i] = int(f)
	}
	return out
}

func near(c, want []int, tol int) bool {
	if len(c) < 3 {
		return false
	}
	for i := 0; i < 3; i++ {
		if d := c[i] - want[i]; d < -tol || d > tol {
			return false
		}
	}
	return true
}

func countNear(v any, want []int, tol int) int {
	a, _ := v.([]any)
	n := 0
	for _, c := range a {
		if near(toInts(c), want, tol) {
			n++
		}
	}
	return n
}

// frameMsg builds a kind-1 frame update by the layout in DEVELOPERS.md
// ("Websocket protocol"), independently of the server's encoder.
func frameMsg(enc byte, scale, frame, mw, mh int, g, limit float32, cells []int, box [4]uint16, peak float32) []byte {
	var mask []byte
	if enc == 0 {
		mask = make([]byte, (mw*mh+7)/8)
		for _, c := range cells {
			mask[c>>3] |= 1 << (c & 7)
		}
	} else {
		prev := 0
		for _, c := range cells {
			mask = binary.AppendUvarint(mask, uint64(c-prev))
			prev = c
		}
	}
	le := binary.LittleEndian
	b := []byte{1, 2}
	b = le.AppendUint16(b, uint16(scale))
	b = le.AppendUint32(b, uint32(frame))
	b = le.AppendUint32(b, math.Float32bits(g))
	b = le.AppendUint32(b, math.Float32bits(limit))
	b = le.AppendUint16(b, uint16(mw))
	b = le.AppendUint16(b, uint16(mh))
	b = append(b, enc)
	b = le.AppendUint32(b, uint32(len(mask)))
	b = append(b, mask...)
	b = le.AppendUint16(b, 1)
	for _, v := range box {
		b = le.AppendUint16(b, v)
	}
	return le.AppendUint32(b, math.Float32bits(peak))
}

// checkFrameDecoding feeds the page's decoder both mask encodings, with
// cell gaps that need one, two and three varint bytes, and a cut message.
func checkFrameDecoding(t *testing.T, tab context.Context) {
	t.Helper()
	cells := []int{0, 5, 130, 20000, 59999}
	box := [4]uint16{7, 8, 300, 9}
	for _, enc := range []byte{0, 1} {
		msg := frameMsg(enc, 4, 123456, 300, 200, 3.5, 12.25, cells, box, 2.5)
		got := eval[map[string]any](t, tab, fmt.Sprintf(`sparsewatch.decode(%s)`, jsBytes(msg)))
		want := map[string]any{"state": 2.0, "scale": 4.0, "frame": 123456.0, "g": 3.5, "limit": 12.25, "mw": 300.0, "mh": 200.0}
		for k, w := range want {
			if got[k] != w {
				t.Errorf("mask encoding %d: decoded %s = %v, want %v", enc, k, got[k], w)
			}
		}
		if c := toInts(got["cells"]); fmt.Sprint(c) != fmt.Sprint(cells) {
			t.Errorf("mask encoding %d: decoded cells %v, want %v", enc, c, cells)
		}
		regs, _ := got["regions"].([]any)
		if len(regs) != 1 || fmt.Sprint(regs[0]) != "map[peak:2.5 x0:7 x1:300 y0:8 y1:9]" {
			t.Errorf("mask encoding %d: decoded regions %v", enc, regs)
		}
		cut := msg[:len(msg)-5]
		if _, err := chromedp.Run(tab, chromedp.Evaluate[map[string]any](fmt.Sprintf(`sparsewatch.decode(%s)`, jsBytes(cut)))); err == nil {
			t.Errorf("mask encoding %d: a message cut short decoded without an error", enc)
		}
	}
}

func jsBytes(b []byte) string {
	var sb strings.Builder
	sb.WriteString("[")
	for i, v := range b {
		if i > 0 {
			sb.WriteString(",")
		}
		fmt.Fprint(&sb, v)
	}
	sb.WriteString("]")
	return sb.String()
}

// BenchmarkPageMaskPaint measures, inside chromium, how long the page takes
// to decode one frame update's read mask and paint it into its layer, for
// masks at the 48 KB bound of the protocol (1024 x 1024 streams).
//
//	go test -run X -bench PageMaskPaint ./web/
func BenchmarkPageMaskPaint(b *testing.B) {
	ts := httptest.NewServer(http.FileServerFS(web.FS))
	defer ts.Close()
	tab := newBrowser(b, 2*time.Minute)
	if err := chromedp.Do(tab, chromedp.Navigate(ts.URL+"/")); err != nil {
		b.Fatal(err)
	}
	for _, c := range []struct {
		name   string
		enc    byte
		mw, mh int
		marked int
	}{
		{"bitset-512x768-3pct", 0, 512, 768, 31457},    // 512 x 768 cells: a bitset of exactly 48 KB
		{"list-1024x1024-3pct", 1, 1024, 1024, 31457},  // 3% of 1024 x 1024 as a delta list
		{"bitset-1024x384-25pct", 0, 1024, 384, 98304}, // a dense mask
	} {
		b.Run(c.name, func(b *testing.B) {
			rng := rand.New(rand.NewPCG(1, uint64(c.marked)))
			cells := rng.Perm(c.mw * c.mh)[:c.marked]
			slices.Sort(cells)
			msg := jsBytes(frameMsg(c.enc, 1, 1, c.mw, c.mh, 1, 2, cells, [4]uint16{}, 0))
			eval[bool](b, tab, `window.benchMsg = `+msg+`, true`)
			b.ResetTimer()
			ms := eval[float64](b, tab, fmt.Sprintf(`(() => { const t0 = performance.now();
				for (let i = 0; i < %d; i++) sparsewatch.paintMask(window.benchMsg);
				return performance.now() - t0; })()`, b.N))
			b.ReportMetric(ms/float64(b.N), "ms/update")
		})
	}
}
