package server

import (
	"context"
	"encoding/json"
	"image"
	"math"
	"net/http"
	"os"
	"os/exec"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"sparsewatch/frames"
	"sparsewatch/monitor"
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

// TestPlanBootstrapComparesNormal plans from a session's reference frames
// and checks each row carries the normal model's limit, the very limit the
// normal-model plan finds with the same seeds, and that limit's ARL0 on the
// bootstrap, and that the note explains the comparison.
func TestPlanBootstrapComparesNormal(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := planSession(t, ts, nil)
	waitReport(t, ts.Server, cr.ID) // the frame size and reference frames are known
	req := `{"tile":2,"radius":2,"shift":1.5,"arl0":60,"budgets":["20%"],"policies":["adaptive","full"],"runs":6,"paths":12,"model":"bootstrap","seed":3}`
	if c, b := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/plan", cr.OwnerToken, "application/json", strings.NewReader(req)); c != http.StatusAccepted {
		t.Fatalf("POST plan: %d %s", c, b)
	}
	rec := waitPlan(t, ts, cr.ID, cr.OwnerToken, 3*time.Minute)
	if rec.State != "done" || rec.Model != "bootstrap" || len(rec.Results) != 2 {
		t.Fatalf("plan: %s %q, %d rows: %s", rec.State, rec.Model, len(rec.Results), rec.Message)
	}
	spec := monitor.PlanSpec{Width: rec.GridW, Height: rec.GridH, Radius: rec.Radius, Shift: 1.5, Budgets: []float64{0.2},
		Policies: []monitor.Policy{monitor.Adaptive, monitor.Full}, ARL0: 60, TopR: rec.Request.TopR,
		CompFraction: mustSession(t, ts, cr.ID).metaCopy().Params.Compensation, Runs: 6, Paths: 12, Seed: 3}
	normal, err := monitor.Plan(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	for i, r := range rec.Results {
		if r.NormalLimit != normal[i].Limit {
			t.Errorf("%s: normal-model limit %v beside the bootstrap's, the normal-model plan found %v", r.Policy, r.NormalLimit, normal[i].Limit)
		}
		if !(r.NormalARL0 > 0) || !(r.NormalARL0SE > 0) || !(r.Limit > 0) {
			t.Errorf("%s: want a bootstrap limit and the normal limit's ARL0 on the bootstrap: %+v", r.Policy, r)
		}
	}
	t.Log(rec.ModelNote)
	if !strings.Contains(rec.ModelNote, "normal-model limit") || !strings.Contains(rec.ModelNote, "target 60") {
		t.Errorf("model note %q does not compare the limits", rec.ModelNote)
	}
}

// TestCompareNote checks the explanation follows the measured ARL0s.
func TestCompareNote(t *testing.T) {
	row := func(a, se float64) planRow {
		return planRow{Policy: "adaptive", Budget: 0.03, Limit: 20, NormalLimit: 19, NormalARL0: a, NormalARL0SE: se}
	}
	for _, c := range []struct {
		rows []planRow
		want string
	}{
		{[]planRow{row(980, 30), row(1030, 40)}, "differ only by simulation noise"},
		{[]planRow{row(600, 30), row(1010, 40)}, "1 of 2 cases the normal-model limit alarms more often"},
		{[]planRow{row(1600, 30), row(1500, 40)}, "2 of 2 cases the normal-model limit alarms less often"},
	} {
		if got := compareNote(c.rows, 1000); !strings.Contains(got, c.want) {
			t.Errorf("%+v: note %q, want %q", c.rows, got, c.want)
		}
	}
	full := planRow{Policy: "full", Budget: 0.01, Limit: 30, NormalLimit: 28, NormalARL0: 300, NormalARL0SE: 30}
	full3 := full
	full3.Budget = 0.03
	if got := compareNote([]planRow{full, row(990, 30), full3}, 1000); !strings.Contains(got, "1 of 2 cases") {
		t.Errorf("full at two budgets is one case: note %q", got)
	}
	if got := compareNote([]planRow{{Policy: "adaptive", Limit: 20}}, 1000); got != "" {
		t.Errorf("no comparison: note %q, want none", got)
	}
}

// TestMeasureFurnaceBootstrap is a measurement, not a unit test: run it with
// SPARSEWATCH_MEASURE=1 go test -v -run TestMeasureFurnaceBootstrap ./server/
// (a few minutes). It plans the furnace demo (tile 4, adaptive, 3%, shift 2)
// with the bootstrap of its 150 reference frames and with the normal model,
// then runs the engine with each limit on fresh in-control frames of the
// same scene (other noise seeds, one after another) and measures the ARL0
// each limit really gives, counted as the calibration counts it (burn-in,
// then run lengths with a gap after each alarm). Two kinds of fresh frames:
// the whole in-control run of each seed (frames 0-199, the same stretch of
// the slow wall drift the reference saw, and more), and only the frames
// after the reference (150-199, where the drift has risen to its crest).
func TestMeasureFurnaceBootstrap(t *testing.T) {
	if os.Getenv("SPARSEWATCH_MEASURE") == "" {
		t.Skip("measurement: set SPARSEWATCH_MEASURE=1")
	}
	target := 200.0
	if v, err := strconv.ParseFloat(os.Getenv("SPARSEWATCH_ARL0"), 64); err == nil {
		target = v
	}
	ts := mustServer(t, Options{})
	p := DefaultParams()
	p.Pace, p.Limit = 0, 1e9 // the review is not needed: only the reference frames
	sess, err := ts.CreateDemo("furnace", "furnace", p, map[string]bool{"pace": true, "limit": true})
	if err != nil {
		t.Fatal(err)
	}
	m := sess.metaCopy()
	tile, shift := m.Params.Tile, m.Params.Shift
	sc, _ := lookupDemo("furnace")
	gw, gh := (sc.Width+tile-1)/tile, (sc.Height+tile-1)/tile
	boot, note, err := ts.planBootFrames(context.Background(), sess, tile, gw, gh)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("tile %d, shift %g, %d x %d streams; %s", tile, shift, gw, gh, note)
	spec := monitor.PlanSpec{Width: gw, Height: gh, Radius: 3.0 / float64(tile), Shift: shift, Budgets: []float64{0.03},
		Policies: []monitor.Policy{monitor.Adaptive}, ARL0: target, TopR: m.Params.TopR, CompFraction: m.Params.Compensation,
		Runs: 20, Paths: envInt("SPARSEWATCH_PATHS", 200), Seed: 1}
	t0 := time.Now()
	bres, bcmp, err := planBootstrap(context.Background(), spec, boot)
	if err != nil {
		t.Fatal(err)
	}
	nres, err := monitor.Plan(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	hB, hN := bres[0].Limit, nres[0].Limit
	t.Logf("planner's comparison: normal-model limit %.3f gives ARL0 %.0f ± %.0f on the bootstrap", bcmp[0].NormalLimit, bcmp[0].NormalARL0, bcmp[0].NormalARL0SE)
	t.Logf("planned in %s: bootstrap limit %.3f (simulated ARL0 %.0f ± %.0f), normal limit %.3f (simulated ARL0 %.0f ± %.0f)",
		time.Since(t0).Round(time.Second), hB, bres[0].ARL0, bres[0].ARL0SE, hN, nres[0].ARL0, nres[0].ARL0SE)
	// The session's model, learnt from the same reference frames.
	tiler, _ := frames.NewTiler(sc.Width, sc.Height, tile)
	lr, _ := monitor.NewLearner(tiler.Streams(), m.Params.ReferenceFrames, monitor.ModelOptions{Kind: monitor.ModelKind(m.Params.Model)})
	var fr frames.Frame
	for i := 0; i < m.Params.ReferenceFrames; i++ {
		img, _ := sc.Frame(i)
		frames.FromImage(img, &fr)
		v := make([]float32, tiler.Streams())
		tiler.Means(&fr, v)
		lr.Add(v)
	}
	md, err := lr.Model()
	if err != nil {
		t.Fatal(err)
	}
	cfg := monitor.Config{Width: gw, Height: gh, Budget: 144, TopR: m.Params.TopR, Shift: shift, Policy: monitor.Adaptive,
		CompFraction: m.Params.Compensation}
	if q, _ := monitor.BudgetStreams(0.03, gw*gh); q != cfg.Budget {
		cfg.Budget = q
	}
	alarms, maxCounted := envInt("SPARSEWATCH_ALARMS", 40), envInt("SPARSEWATCH_MAX_FRAMES", 20000)
	// The fresh frames are frames from..199 (the change starts at 200) of
	// other noise seeds, one seed after another.
	type out struct {
		arl, se float64
		n       int
	}
	measure := func(h float64, seed0 uint64, from int) out {
		md := md.Clone() // each measurement learns on its own frames
		c := cfg
		c.Limit = h
		eng, err := monitor.New(c)
		if err != nil {
			t.Fatal(err)
		}
		burn, gap := monitor.SteadyBurnin(c), max(50, monitor.SteadyBurnin(c)/4)
		fresh := sc
		fresh.Seed = seed0
		i := from
		raw := make([]float32, tiler.Streams())
		z := make([]float32, tiler.Streams())
		miss := make([]bool, tiler.Streams())
		var img = image.NewGray16(image.Rect(0, 0, sc.Width, sc.Height))
		step := func() float64 {
			if i >= 200 { // the change starts at frame 200: next noise seed
				fresh.Seed++
				i = from
			}
			fresh.FrameInto(img, i)
			i++
			frames.FromImage(img, &fr)
			tiler.Means(&fr, raw)
			idx := eng.Next()
			vals := make([]float32, len(idx))
			for k, j := range idx {
				vals[k] = raw[j]
			}
			md.Standardize(z[:len(idx)], miss[:len(idx)], idx, vals)
			u, err := eng.Step(z[:len(idx)], miss[:len(idx)])
			if err != nil {
				t.Fatal(err)
			}
			if u.State == monitor.Watching { // as the review does: a self-start model learns on
				md.Learn(idx, vals, miss[:len(idx)])
			}
			return u.G
		}
		for k := 0; k < burn; k++ {
			step()
		}
		// At most maxCounted frames are counted: a window cut there is
		// censored, and ARL0 is counted frames over alarms (as Calibrate).
		var counted, got int
		for got < alarms && counted < maxCounted {
			n, hit := 0, false
			for counted+n < maxCounted {
				n++
				if step() >= h {
					hit = true
					break
				}
			}
			counted += n
			if !hit {
				break
			}
			got++
			for k := 0; k < gap; k++ {
				step()
			}
		}
		a := float64(counted) / float64(max(got, 1))
		t.Logf("limit %.3f, frames %d-199: %d alarms in %d counted frames: ARL0 %.0f", h, from, got, counted, a)
		return out{a, a / math.Sqrt(float64(max(got, 1))), got}
	}
	froms := []int{0, m.Params.ReferenceFrames}
	res := make([][2]out, len(froms)) // [window][bootstrap, normal]
	var wg sync.WaitGroup
	for w, from := range froms {
		for k, h := range []float64{hB, hN} {
			wg.Add(1)
			go func() { defer wg.Done(); res[w][k] = measure(h, 1000, from) }()
		}
	}
	wg.Wait()
	t.Logf("target ARL0 %g on fresh in-control furnace frames (up to %d alarms or %d counted frames each, seeds from 1000):", target, alarms, maxCounted)
	for w, from := range froms {
		rb, rn := res[w][0], res[w][1]
		t.Logf(" frames %d-199 of each seed:", from)
		t.Logf("  bootstrap limit %.3f: ARL0 %.0f ± %.0f (%+.0f%% from the target)", hB, rb.arl, rb.se, 100*(rb.arl/target-1))
		t.Logf("  normal    limit %.3f: ARL0 %.0f ± %.0f (%+.0f%% from the target)", hN, rn.arl, rn.se, 100*(rn.arl/target-1))
	}
}

// envInt reads a measurement setting from the environment.
func envInt(name string, def int) int {
	if v, err := strconv.Atoi(os.Getenv(name)); err == nil {
		return v
	}
	return def
}
