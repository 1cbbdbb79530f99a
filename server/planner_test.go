package server

import (
	"encoding/json"
	"net/http"
	"os/exec"
	"runtime"
	"strings"
	"testing"
	"time"
)

// smallPlan is a planner request that takes a second or two.
const smallPlan = `{"width":16,"height":16,"tile":1,"radius":2,"shift":1.5,"arl0":60,"budgets":["10%","30%"],` +
	`"policies":["adaptive","full","oracle"],"runs":6,"paths":8,"target_delay":50}`

// planSession uploads a short session with a fixed limit (no calibration).
func planSession(t *testing.T, ts *testServer, episodes [][2]int) createdResponse {
	t.Helper()
	files := synthFrames(t, 24, 16, 60, episodes)
	return ts.mustUpload(t, files, `{"budget":"20%","top_r":4,"reference_frames":20,"seed":7,"limit":12,"pace":0}`)
}

// waitPlan polls GET .../plan until its state is not "running".
func waitPlan(t *testing.T, ts *testServer, id, tok string, limit time.Duration) planRecord {
	t.Helper()
	deadline := time.Now().Add(limit)
	for {
		code, b := ts.do(t, "GET", "/api/sessions/"+id+"/plan", tok, "", nil)
		if code != http.StatusOK {
			t.Fatalf("GET plan: %d %s", code, b)
		}
		var rec planRecord
		if err := json.Unmarshal(b, &rec); err != nil {
			t.Fatal(err)
		}
		if rec.State != "running" {
			return rec
		}
		if time.Now().After(deadline) {
			t.Fatalf("plan still running after %s: progress %.2f", limit, rec.Progress)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

func TestPlanAccessAndKept(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := planSession(t, ts, nil)
	post := func(tok, body string) (int, []byte) {
		return ts.do(t, "POST", "/api/sessions/"+cr.ID+"/plan", tok, "application/json", strings.NewReader(body))
	}
	if c, b := post(cr.ShareToken, smallPlan); c != http.StatusForbidden {
		t.Fatalf("share token POST plan: %d %s, want 403", c, b)
	}
	if c, _ := post("", smallPlan); c != http.StatusUnauthorized {
		t.Fatalf("POST plan without token: %d, want 401", c)
	}
	if c, _ := ts.do(t, "DELETE", "/api/sessions/"+cr.ID+"/plan", cr.ShareToken, "", nil); c != http.StatusForbidden {
		t.Fatalf("share token DELETE plan: %d, want 403", c)
	}
	if c, b := post(cr.OwnerToken, `{"width":16,"height":16,"policies":["psychic"]}`); c != http.StatusBadRequest || !strings.Contains(string(b), "psychic") {
		t.Fatalf("bad policy: %d %s, want 400 naming it", c, b)
	}
	if c, b := post(cr.OwnerToken, smallPlan); c != http.StatusAccepted {
		t.Fatalf("owner POST plan: %d %s, want 202", c, b)
	}
	if c, _ := post(cr.OwnerToken, smallPlan); c != http.StatusServiceUnavailable {
		// The run may be done already on a fast machine; only a running one must refuse.
		if p := plannerOf(mustSession(t, ts, cr.ID)); p != nil && p.snapshot().State == "running" {
			t.Fatalf("second POST while running: %d, want 503", c)
		}
	}
	rec := waitPlan(t, ts, cr.ID, cr.ShareToken, 3*time.Minute) // a share link may read it
	if rec.State != "done" || len(rec.Results) != 6 || rec.Advice == nil {
		t.Fatalf("plan: state %q, %d results (want 2 budgets x 3 policies), advice %v: %s", rec.State, len(rec.Results), rec.Advice, rec.Message)
	}
	for _, r := range rec.Results {
		if !(r.Limit > 0) || r.Streams < 1 {
			t.Errorf("row %+v: want a positive limit and stream count", r)
		}
	}
	// Kept with the session: plan.json, read back by a new server on the same data.
	sess := mustSession(t, ts, cr.ID)
	disk, ok := loadPlan(sess.dir)
	if !ok || disk.State != "done" || len(disk.Results) != len(rec.Results) || disk.Results[0] != rec.Results[0] {
		t.Fatalf("plan.json: ok %v, %+v; want the answered results", ok, disk.Results)
	}
	planners.Delete(sess) // as after a restart: only the file is left
	code, b := ts.do(t, "GET", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "", nil)
	var again planRecord
	json.Unmarshal(b, &again)
	if code != http.StatusOK || again.State != "done" || len(again.Results) != 6 || again.Results[5] != rec.Results[5] {
		t.Fatalf("GET plan from disk: %d %s", code, b)
	}
}

func mustSession(t *testing.T, ts *testServer, id string) *Session {
	t.Helper()
	s, err := ts.session(id)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// TestPlanCancelFreesCPU starts a long plan, cancels it and checks that
// monitor.Plan has returned, and its worker goroutines are gone, within
// a second of the DELETE.
func TestPlanCancelFreesCPU(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := planSession(t, ts, nil)
	sess := mustSession(t, ts, cr.ID)
	waitReport(t, ts.Server, cr.ID)
	time.Sleep(100 * time.Millisecond)
	base := runtime.NumGoroutine()
	long := `{"width":128,"height":128,"radius":4,"arl0":100000,"budgets":["3%","10%"],"policies":["adaptive","random","full"],"runs":2000,"paths":2000}`
	if c, b := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "application/json", strings.NewReader(long)); c != http.StatusAccepted {
		t.Fatalf("POST plan: %d %s", c, b)
	}
	p := plannerOf(sess)
	time.Sleep(300 * time.Millisecond) // workers are busy simulating
	if n := runtime.NumGoroutine(); n <= base+1 {
		t.Fatalf("goroutines before %d, while planning %d: the plan's workers are not running", base, n)
	}
	t0 := time.Now()
	code, b := ts.do(t, "DELETE", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "", nil)
	select {
	case <-p.done:
	case <-time.After(5 * time.Second):
		t.Fatalf("plan still running 5 s after the cancel")
	}
	took := time.Since(t0)
	if code != http.StatusOK || !strings.Contains(string(b), `"cancelled"`) {
		t.Fatalf("DELETE plan: %d %s", code, b)
	}
	// Worker goroutines end before Calibrate returns; allow a little for
	// the HTTP client's own.
	var n int
	for i := 0; i < 20; i++ {
		if n = runtime.NumGoroutine(); n <= base+2 {
			break
		}
		time.Sleep(10 * time.Millisecond)
	}
	took2 := time.Since(t0)
	t.Logf("plan returned %s after the cancel; goroutines %d before, %d after (%s)", took, base, n, took2)
	if took2 > time.Second {
		t.Fatalf("cancel took %s (goroutines %d, before %d); want the CPU free within 1 s", took2, n, base)
	}
	if n > base+2 {
		t.Fatalf("%d goroutines after the cancel, %d before: workers left running", n, base)
	}
	if rec, ok := loadPlan(sess.dir); ok {
		t.Fatalf("a cancelled plan was saved: %+v", rec)
	}
}

// TestPlanMatchesCommand: the planner's figures for the 128 x 128 /
// radius 4 / shift 1 / ARL0 1000 / 3% case equal `sparsewatch plan`'s for
// the same seed (both call monitor.Plan with the same spec).
func TestPlanMatchesCommand(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and plans a 128 x 128 grid")
	}
	if raceEnabled {
		t.Skip("calibration under -race is about ten times slower; the numbers are checked in the plain run")
	}
	runs, paths := "20", "40"
	bin := mustBinary(t)
	type cmdOut struct {
		out []byte
		err error
	}
	ch := make(chan cmdOut, 1)
	go func() {
		out, err := exec.Command(bin, "plan", "--width", "128", "--height", "128", "--radius", "4", "--shift", "1",
			"--arl0", "1000", "--budget", "3%", "--policies", "adaptive", "--runs", runs, "--paths", paths, "--seed", "1", "--json").Output()
		ch <- cmdOut{out, err}
	}()
	ts := mustServer(t, Options{})
	cr := planSession(t, ts, nil)
	req := `{"width":128,"height":128,"tile":1,"radius":4,"shift":1,"arl0":1000,"budgets":["3%"],"policies":["adaptive"],"top_r":10,` +
		`"runs":` + runs + `,"paths":` + paths + `,"seed":1,"target_delay":30}`
	if c, b := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "application/json", strings.NewReader(req)); c != http.StatusAccepted {
		t.Fatalf("POST plan: %d %s", c, b)
	}
	rec := waitPlan(t, ts, cr.ID, cr.OwnerToken, 10*time.Minute)
	co := <-ch
	if co.err != nil {
		t.Fatalf("plan command: %v", co.err)
	}
	var want struct {
		Results []planRow `json:"results"`
	}
	if err := json.Unmarshal(co.out, &want); err != nil {
		t.Fatalf("plan --json: %v\n%s", err, co.out)
	}
	if rec.State != "done" || len(rec.Results) != 1 || len(want.Results) != 1 {
		t.Fatalf("api %q %d rows, command %d rows: %s", rec.State, len(rec.Results), len(want.Results), rec.Message)
	}
	got, w := rec.Results[0], want.Results[0]
	t.Logf("api: %+v\ncommand: %+v", got, w)
	if got.Streams != 492 { // round(0.03 x 16384)
		t.Errorf("streams %d, want 492 (3%% of 16384)", got.Streams)
	}
	if got.Limit != w.Limit || got.ADD != w.ADD || got.ADDSE != w.ADDSE || got.ARL0 != w.ARL0 || got.Streams != w.Streams || got.FalseAlarms != w.FalseAlarms {
		t.Fatalf("the planner and the plan command disagree:\napi     %+v\ncommand %+v", got, w)
	}
	if rec.Advice == nil || (rec.Advice.Met != (got.ADD <= 30)) {
		t.Errorf("advice %+v for ADD %.3g and a target of 30 frames", rec.Advice, got.ADD)
	}
}

func TestAdvice(t *testing.T) {
	rows := []planRow{
		{Policy: "adaptive", Budget: 0.01, Streams: 10, ADD: 40},
		{Policy: "random", Budget: 0.01, Streams: 10, ADD: 90},
		{Policy: "adaptive", Budget: 0.03, Streams: 30, ADD: 18},
		{Policy: "random", Budget: 0.03, Streams: 30, ADD: 25},
		{Policy: "full", Budget: 0.03, Streams: 30, ADD: 9},
		{Policy: "oracle", Budget: 0.03, Streams: 30, ADD: 2},
	}
	for _, c := range []struct {
		target float64
		met    bool
		policy string
		budget float64
	}{
		{50, true, "adaptive", 0.01}, // smallest budget meeting 50: adaptive at 1%
		{20, true, "adaptive", 0.03}, // only adaptive at 3% (18) meets 20
		{10, false, "", 0},           // only full does
		{0, false, "adaptive", 0.03}, // no target: the shortest delay
	} {
		a := advise(rows, c.target)
		if a.Met != c.met || a.Policy != c.policy || a.Budget != c.budget {
			t.Errorf("target %g: %+v, want met %v %s at %g", c.target, a, c.met, c.policy, c.budget)
		}
		if a.FullADD != 9 || a.OracleADD != 2 || a.Text == "" {
			t.Errorf("target %g: full %g oracle %g text %q", c.target, a.FullADD, a.OracleADD, a.Text)
		}
	}
	if a := advise(rows, 20); a.VsFull != 2 || a.VsOracle != 9 {
		t.Errorf("distance from full %g (want 18/9 = 2) and from the oracle %g (want 18/2 = 9)", a.VsFull, a.VsOracle)
	}
}
