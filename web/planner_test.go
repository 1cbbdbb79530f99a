package web_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"mime/multipart"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"sparsewatch/monitor"
	"sparsewatch/server"
)

// uploadFrames starts a session from files through the API, as the page's
// upload does, and returns the created answer.
func uploadFrames(t *testing.T, url string, paths []string, params string) (id, owner, share string) {
	t.Helper()
	var buf bytes.Buffer
	w := multipart.NewWriter(&buf)
	for _, p := range paths {
		data, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		fw, _ := w.CreateFormFile("files", filepath.Base(p))
		fw.Write(data)
	}
	w.WriteField("params", params)
	w.Close()
	res, err := http.Post(url+"/api/sessions", w.FormDataContentType(), &buf)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	var cr struct {
		ID         string `json:"id"`
		OwnerToken string `json:"owner_token"`
		ShareToken string `json:"share_token"`
	}
	if err := json.NewDecoder(res.Body).Decode(&cr); err != nil || res.StatusCode != http.StatusCreated {
		t.Fatalf("upload: %d %v", res.StatusCode, err)
	}
	return cr.ID, cr.OwnerToken, cr.ShareToken
}

func getJSON(t *testing.T, url, tok string, v any) {
	t.Helper()
	req, _ := http.NewRequest("GET", url, nil)
	req.Header.Set("Authorization", "Bearer "+tok)
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	if err := json.NewDecoder(res.Body).Decode(v); err != nil || res.StatusCode != http.StatusOK {
		t.Fatalf("GET %s: %d %v", url, res.StatusCode, err)
	}
}

// TestPlannerAndReport drives the owner page: runs the budget planner with
// small settings, waits for its plot, checks the recommended budget against
// monitor.Plan run here with the same spec (what the plan command calls),
// then fetches the HTML report behind the page's download link, opens it
// and checks it makes no request and holds every alarm of the session.
func TestPlannerAndReport(t *testing.T) {
	paths := writeFrames(t)
	srv, err := server.New(server.Options{DataDir: t.TempDir(), Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(srv.Handler())
	t.Cleanup(func() { ts.Close(); srv.Close() })
	srv.SetBaseURL(ts.URL)
	// tile 2: a 16 x 12 stream grid; a fixed limit (as the upload test's
	// race case) so no calibration is needed for the review itself.
	id, owner, _ := uploadFrames(t, ts.URL, paths[:len(paths)-1],
		fmt.Sprintf(`{"budget":"10%%","tile":2,"reference_frames":%d,"limit":90,"pace":0}`, testRef))

	tab := newBrowser(t, 3*time.Minute)
	if err := chromedp.Do(tab, chromedp.Navigate(ts.URL+"/watch/"+id+"#token="+owner)); err != nil {
		t.Fatal(err)
	}
	poll[bool](t, tab, "the finished review", `document.body.dataset.role === "owner" && document.body.dataset.state === "finished"`, 60*time.Second)
	size := eval[[]int](t, tab, `["width", "height", "tile"].map((n) => +document.querySelector("#plan-form [name='" + n + "']").value)`)
	if size[0] != testW || size[1] != testH || size[2] != 2 {
		t.Errorf("planner frame size and tile %v, want the session's %d x %d, tile 2", size, testW, testH)
	}

	t.Run("Planner", func(t *testing.T) {
		const target = 40.0
		eval[bool](t, tab, fmt.Sprintf(`(() => {
			const f = (n) => document.querySelector("#plan-form [name='" + n + "']");
			f("size-mode").value = "radius"; f("size").value = 2; f("shift").value = 1.5;
			f("budgets").value = "10%%, 30%%"; f("runs").value = 6; f("paths").value = 8;
			f("arl0").value = 60; f("target_delay").value = %g;
			for (const cb of document.querySelectorAll("#plan-policies input"))
				cb.checked = ["adaptive", "random", "full", "oracle"].includes(cb.value);
			document.getElementById("plan-run").click();
			return true; })()`, target))
		poll[bool](t, tab, "the plan plot", `document.body.dataset.planState === "done" && +document.body.dataset.planPoints > 0 &&
			document.querySelectorAll("#plan-plot svg circle.pt").length > 0`, 2*time.Minute)
		shot(t, tab, "7-planner-page")
		pts := eval[int](t, tab, `document.querySelectorAll("#plan-plot svg circle.pt").length`)
		if pts != 4 { // adaptive and random at two budgets; full and oracle are lines
			t.Errorf("%d points on the plot, want 4 (2 policies x 2 budgets)", pts)
		}
		var rec struct {
			Results []struct {
				Policy  string  `json:"policy"`
				Streams int     `json:"streams"`
				ADD     float64 `json:"add"`
			} `json:"results"`
			Advice struct {
				Streams int    `json:"streams"`
				Policy  string `json:"policy"`
			} `json:"advice"`
		}
		getJSON(t, ts.URL+"/api/sessions/"+id+"/plan", owner, &rec)
		// The same spec through the engine: 16 x 12 streams, radius 2 px = 1 stream.
		res, err := monitor.Plan(context.Background(), monitor.PlanSpec{Width: 16, Height: 12, Radius: 1, Shift: 1.5,
			Budgets: []float64{0.1, 0.3}, Policies: []monitor.Policy{monitor.Adaptive, monitor.Random, monitor.Full, monitor.Oracle},
			ARL0: 60, TopR: 10, CompFraction: 0.25, Runs: 6, Paths: 8, Seed: 1})
		if err != nil {
			t.Fatal(err)
		}
		want := 0
		for _, r := range res {
			if r.Policy == monitor.Full || r.Policy == monitor.Oracle || !(r.ADD <= target) {
				continue
			}
			if want == 0 || r.Streams < want {
				want = r.Streams
			}
		}
		for i, r := range res {
			if rec.Results[i].ADD != r.ADD || rec.Results[i].Streams != r.Streams {
				t.Errorf("row %d: API %+v, engine %s %d streams ADD %g", i, rec.Results[i], r.Policy, r.Streams, r.ADD)
			}
		}
		got := eval[string](t, tab, `document.body.dataset.planRecommended || "none"`)
		t.Logf("recommended %s streams on the page, %d from the API (%s), %d from the engine; advice: %s", got, rec.Advice.Streams,
			rec.Advice.Policy, want, eval[string](t, tab, `document.getElementById("plan-advice").textContent`))
		if want == 0 {
			if got != "none" {
				t.Errorf("no budget meets %g frames in the engine's figures, the page recommends %s", target, got)
			}
			return
		}
		if got != fmt.Sprint(want) || rec.Advice.Streams != want {
			t.Errorf("recommended budget: page %s streams, API %d, engine %d", got, rec.Advice.Streams, want)
		}
	})

	t.Run("Report", func(t *testing.T) {
		var rep struct {
			Alarms []struct {
				Frame int `json:"frame"`
			} `json:"alarms"`
		}
		getJSON(t, ts.URL+"/api/sessions/"+id+"/report", owner, &rep)
		if len(rep.Alarms) == 0 {
			t.Fatalf("the session has no alarm to look for")
		}
		// Fetch the file behind the link, then open it in a frame of its
		// own and count the requests it makes (data: pictures make none).
		out, err := chromedp.Run(tab, chromedp.Evaluate[map[string]any](`(async () => {
			const a = document.getElementById("dl-html");
			const html = await (await fetch(a.href)).text();
			const fr = document.createElement("iframe");
			fr.sandbox = "allow-same-origin";
			document.body.appendChild(fr);
			await new Promise((ok) => { fr.onload = ok; fr.srcdoc = html; });
			const w = fr.contentWindow, d = fr.contentDocument;
			await Promise.all([...d.images].map((im) => im.decode().catch(() => {})));
			return {download: a.getAttribute("download") || "", html,
				requests: w.performance.getEntriesByType("resource").map((e) => e.name),
				images: [...d.images].map((im) => im.naturalWidth),
				cells: [...d.querySelectorAll("#alarms tr td:first-child")].map((td) => td.textContent.trim())};
		})()`, chromedp.EvalAwaitPromise))
		if err != nil {
			t.Fatal(err)
		}
		if dl, _ := out["download"].(string); !strings.HasSuffix(dl, ".html") {
			t.Errorf("download name %q, want an .html file", dl)
		}
		if reqs, _ := out["requests"].([]any); len(reqs) != 0 {
			t.Errorf("the report made requests when opened: %v", reqs)
		}
		html, _ := out["html"].(string)
		for _, bad := range []string{"<link", "<script", "http://", "https://"} {
			if i := strings.Index(html, bad); i >= 0 && !strings.HasPrefix(html[i:], "http://www.w3.org/2000/svg") {
				t.Errorf("report holds %q: %.80s", bad, html[i:])
			}
		}
		cells := fmt.Sprint(out["cells"])
		imgs, _ := out["images"].([]any)
		for _, a := range rep.Alarms {
			if !strings.Contains(" "+strings.Trim(cells, "[]")+" ", fmt.Sprintf(" %d ", a.Frame)) {
				t.Errorf("alarm at frame %d is not in the report's table (first cells %s)", a.Frame, cells)
			}
			if !strings.Contains(html, fmt.Sprintf("Frame %d: regions outlined", a.Frame)) {
				t.Errorf("alarm at frame %d has no picture in the report", a.Frame)
			}
		}
		if len(imgs) != len(rep.Alarms) {
			t.Errorf("%d pictures for %d alarms", len(imgs), len(rep.Alarms))
		}
		for i, w := range imgs {
			if v, _ := w.(float64); v <= 0 {
				t.Errorf("picture %d did not decode in the browser", i)
			}
		}
		if !strings.Contains(html, "Budget plan") {
			t.Errorf("the plan run above is not in the report")
		}
		t.Logf("report: %d bytes, alarms %v", len(html), cells)
	})
}
