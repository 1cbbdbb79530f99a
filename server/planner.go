package server

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"github.com/labstack/echo/v4"

	"sparsewatch/frames"
	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

// The budget planner: what detection delay each sampling policy buys at
// each budget, every policy calibrated to the same in-control ARL0
// (monitor.Plan), run in the background for one session at a time and
// kept in the session folder.

const (
	planFileName   = "plan.json"
	planMaxRuns    = 5000
	planMaxPaths   = 5000
	planMaxBudgets = 12
	planMaxStreams = 4 << 20
	planBootMax    = 1 << 27 // reference values a bootstrap may hold
	planProgGap    = 200 * time.Millisecond
)

// planRequest is the body of POST /api/sessions/{id}/plan. Sizes are in
// pixels; the planner works on the stream grid (pixels / tile).
type planRequest struct {
	Width       int      `json:"width"`  // frame width in pixels (default: the session's)
	Height      int      `json:"height"` // frame height in pixels
	Tile        int      `json:"tile"`   // k x k pixels per stream (default: the session's)
	Radius      float64  `json:"radius"` // radius of the smallest change, pixels
	Area        float64  `json:"area"`   // or its area in pixels (radius = sqrt(area/pi))
	Shift       float64  `json:"shift"`  // change size in noise units (default: the session's)
	ARL0        float64  `json:"arl0"`   // frames between false alarms
	PerHours    float64  `json:"per_hours"`
	FPS         float64  `json:"fps"`
	Budgets     []Budget `json:"budgets"`
	Policies    []string `json:"policies"`
	Runs        int      `json:"runs"`
	Paths       int      `json:"paths"`
	Model       string   `json:"model"` // normal|bootstrap
	TargetDelay float64  `json:"target_delay"`
	TopR        int      `json:"top_r"`
	Seed        uint64   `json:"seed"`
}

// planRow is one policy at one budget, as the API answers it.
type planRow struct {
	Policy      string  `json:"policy"`
	Budget      float64 `json:"budget"` // fraction of the streams read per frame
	Streams     int     `json:"streams"`
	Limit       float64 `json:"limit"`
	ARL0        float64 `json:"arl0"`
	ARL0SE      float64 `json:"arl0_se"`
	ADD         float64 `json:"add"` // -1: no run counted
	ADDSE       float64 `json:"add_se"`
	FalseAlarms int     `json:"false_alarms"`
	Missed      int     `json:"missed"`
	Note        string  `json:"note,omitempty"`
	// With the bootstrap model: the normal model's limit for the same
	// target and the ARL0 that limit gives on the bootstrap of the
	// reference frames (how far off the normal model would be here).
	NormalLimit  float64 `json:"normal_limit,omitempty"`
	NormalARL0   float64 `json:"normal_arl0,omitempty"`
	NormalARL0SE float64 `json:"normal_arl0_se,omitempty"`
}

// planAdvice is the planner's recommendation.
type planAdvice struct {
	Met        bool    `json:"met"` // a budget meets the target delay
	Policy     string  `json:"policy,omitempty"`
	Budget     float64 `json:"budget,omitempty"` // fraction
	Streams    int     `json:"streams,omitempty"`
	ADD        float64 `json:"add,omitempty"`
	FullADD    float64 `json:"full_add,omitempty"`   // every stream read (0: not run)
	OracleADD  float64 `json:"oracle_add,omitempty"` // location known (0: not run)
	VsFull     float64 `json:"vs_full,omitempty"`    // ADD / full ADD
	VsOracle   float64 `json:"vs_oracle,omitempty"`  // ADD / oracle ADD
	ReadVsFull float64 `json:"read_vs_full,omitempty"`
	Text       string  `json:"text"`
}

// planRecord is plan.json and the answer of GET .../plan.
type planRecord struct {
	State    string      `json:"state"` // running|done|cancelled|failed|none
	Progress float64     `json:"progress"`
	Message  string      `json:"message,omitempty"`
	Request  planRequest `json:"request"`
	GridW    int         `json:"grid_w"`
	GridH    int         `json:"grid_h"`
	Streams  int         `json:"streams"`
	Radius   float64     `json:"radius_streams"`
	Changed  int         `json:"changed_streams"`
	Model    string      `json:"model"` // the in-control model the limits come from
	Note     string      `json:"note"`
	// ModelNote (bootstrap only) compares the bootstrap limits with the
	// normal model's and says why they differ.
	ModelNote string      `json:"model_note,omitempty"`
	Results   []planRow   `json:"results"`
	Advice    *planAdvice `json:"advice,omitempty"`
	Started   time.Time   `json:"started"`
	Seconds   float64     `json:"seconds"`
}

// planRun is a session's planner in progress.
type planRun struct {
	cancel context.CancelFunc
	done   chan struct{}
	mu     sync.Mutex
	rec    planRecord
}

// planners holds each session's running or last planner run. It lives
// here, not in Session, so the planner stays in its own file.
var planners sync.Map // *Session -> *planRun

func plannerOf(sess *Session) *planRun {
	v, _ := planners.Load(sess)
	p, _ := v.(*planRun)
	return p
}

func (s *Server) handlePlanStart(c echo.Context) error {
	sess, _, err := s.authorize(c, true)
	if err != nil {
		return err
	}
	body, err := io.ReadAll(http.MaxBytesReader(c.Response(), c.Request().Body, maxJSONBody))
	if err != nil {
		return err
	}
	var req planRequest
	if len(strings.TrimSpace(string(body))) > 0 {
		dec := json.NewDecoder(strings.NewReader(string(body)))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&req); err != nil {
			return errorf(KindInvalid, "plan: %v", err)
		}
	}
	spec, rec, err := s.planSpec(sess, req)
	if err != nil {
		return err
	}
	run := &planRun{done: make(chan struct{}), rec: rec}
	if old, loaded := planners.LoadOrStore(sess, run); loaded {
		op := old.(*planRun)
		select {
		case <-op.done:
			if !planners.CompareAndSwap(sess, old, run) {
				return errorf(KindUnavailable, "plan: another plan was just started")
			}
		default:
			return errorf(KindUnavailable, "plan: a plan is already running for this session; cancel it first")
		}
	}
	ctx, cancel := context.WithCancel(s.ctx)
	run.cancel = cancel
	go s.runPlan(ctx, sess, run, spec, req)
	return c.JSON(http.StatusAccepted, run.snapshot())
}

func (s *Server) handlePlanGet(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	if p := plannerOf(sess); p != nil {
		return c.JSON(http.StatusOK, p.snapshot())
	}
	rec, ok := loadPlan(sess.dir)
	if !ok {
		return c.JSON(http.StatusOK, planRecord{State: "none", Results: []planRow{}})
	}
	return c.JSON(http.StatusOK, rec)
}

func (s *Server) handlePlanCancel(c echo.Context) error {
	sess, _, err := s.authorize(c, true)
	if err != nil {
		return err
	}
	p := plannerOf(sess)
	if p == nil {
		return errorf(KindNotFound, "plan: no plan is running")
	}
	p.cancel()
	select { // Plan checks its context every simulated frame
	case <-p.done:
	case <-time.After(5 * time.Second):
	}
	return c.JSON(http.StatusOK, p.snapshot())
}

func (p *planRun) snapshot() planRecord {
	p.mu.Lock()
	defer p.mu.Unlock()
	r := p.rec
	r.Results = append([]planRow{}, p.rec.Results...)
	return r
}

// planSpec checks a request against the session and fills its defaults.
func (s *Server) planSpec(sess *Session, req planRequest) (monitor.PlanSpec, planRecord, error) {
	st := sess.Status()
	m := sess.metaCopy()
	if req.Width == 0 && req.Height == 0 {
		req.Width, req.Height = st.Width, st.Height
	}
	if req.Tile == 0 {
		req.Tile = max(st.Tile, m.Params.Tile, 1)
	}
	bad := func(format string, a ...any) (monitor.PlanSpec, planRecord, error) {
		return monitor.PlanSpec{}, planRecord{}, errorf(KindInvalid, "plan: "+format, a...)
	}
	switch {
	case req.Width <= 0 || req.Height <= 0:
		return bad("width and height (pixels) are needed: the session has no frame size yet")
	case req.Tile < 1 || req.Tile > 1024:
		return bad("tile %d must be between 1 and 1024", req.Tile)
	}
	gw, gh := (req.Width+req.Tile-1)/req.Tile, (req.Height+req.Tile-1)/req.Tile
	if gw*gh > planMaxStreams || gw*gh < 4 {
		return bad("%d x %d streams: the planner takes 4 to %d", gw, gh, planMaxStreams)
	}
	if req.Area > 0 && req.Radius == 0 {
		req.Radius = math.Sqrt(req.Area / math.Pi)
	}
	if req.Radius == 0 && req.Area == 0 {
		req.Radius = 4
	}
	if !(req.Radius > 0) || math.IsInf(req.Radius, 0) {
		return bad("radius %v (pixels) must be a number > 0", req.Radius)
	}
	if req.Shift == 0 {
		req.Shift = m.Params.Shift
	}
	if !(req.Shift > 0) || math.IsInf(req.Shift, 0) {
		return bad("shift %v must be a number > 0", req.Shift)
	}
	if req.ARL0 == 0 && req.PerHours > 0 && req.FPS > 0 {
		req.ARL0 = math.Round(req.PerHours * 3600 * req.FPS)
	}
	if req.ARL0 == 0 {
		req.ARL0 = m.Params.ARL0
	}
	if !(req.ARL0 >= 2) || req.ARL0 > 1e12 {
		return bad("arl0 %v must be a number of frames in [2, 1e12]", req.ARL0)
	}
	if len(req.Budgets) == 0 {
		req.Budgets = []Budget{"1%", "3%", "10%"}
	}
	if len(req.Budgets) > planMaxBudgets {
		return bad("at most %d budgets", planMaxBudgets)
	}
	var budgets []float64
	for _, b := range req.Budgets {
		v, err := planBudget(b)
		if err != nil {
			return bad("%v", err)
		}
		budgets = append(budgets, v)
	}
	if len(req.Policies) == 0 {
		req.Policies = []string{"adaptive", "random", "full", "oracle"}
	}
	var pols []monitor.Policy
	for _, p := range req.Policies {
		pol, err := monitor.ParsePolicy(strings.TrimSpace(p))
		if err != nil {
			return bad("policy %q unknown (adaptive, thompson, spatial, random, stride, full, oracle)", p)
		}
		pols = append(pols, pol)
	}
	if req.Runs == 0 {
		req.Runs = 200
	}
	if req.Paths == 0 {
		req.Paths = 200
	}
	if req.Runs < 1 || req.Runs > planMaxRuns || req.Paths < 4 || req.Paths > planMaxPaths {
		return bad("runs must be 1-%d and paths 4-%d", planMaxRuns, planMaxPaths)
	}
	switch req.Model {
	case "":
		req.Model = "normal"
	case "normal", "bootstrap":
	default:
		return bad("model %q unknown (normal or bootstrap)", req.Model)
	}
	if req.TargetDelay < 0 || math.IsNaN(req.TargetDelay) {
		return bad("target_delay %v must be frames >= 0 (0: no target)", req.TargetDelay)
	}
	if req.TopR == 0 {
		req.TopR = max(m.Params.TopR, 1)
	}
	if req.Seed == 0 {
		req.Seed = 1 // as the plan command
	}
	rs := req.Radius / float64(req.Tile)
	spec := monitor.PlanSpec{Width: gw, Height: gh, Radius: rs, Shift: req.Shift, Budgets: budgets,
		Policies: pols, ARL0: req.ARL0, TopR: req.TopR, CompFraction: m.Params.Compensation,
		Runs: req.Runs, Paths: req.Paths, Seed: req.Seed}
	if spec.CompFraction == 0 {
		spec.Compensation = 1e-12 // zero credit: the engine reads 0 as "default"
	}
	disk := monitor.Disk(gw, gh, gw/2, gh/2, rs)
	if len(disk) == 0 {
		return bad("a change of radius %v pixels covers no %d x %d tile", req.Radius, req.Tile, req.Tile)
	}
	for _, b := range budgets {
		if _, err := monitor.BudgetStreams(b, gw*gh); err != nil {
			return bad("%s", strings.TrimPrefix(err.Error(), "monitor: "))
		}
	}
	rec := planRecord{State: "running", Request: req, GridW: gw, GridH: gh, Streams: gw * gh,
		Radius: rs, Changed: len(disk), Model: req.Model, Results: []planRow{}, Started: time.Now().UTC()}
	return spec, rec, nil
}

// planBudget reads "3%", "0.03" or "500" as monitor.BudgetStreams takes
// it; 100% is every stream (as the plan command reads it).
func planBudget(b Budget) (float64, error) {
	s := strings.TrimSpace(string(b))
	v, err := review.ParseBudget(s)
	if err != nil {
		return 0, err
	}
	if v == 1 && strings.HasSuffix(s, "%") {
		v = math.Nextafter(1, 0)
	}
	return v, nil
}

// runPlan runs the planner and keeps its outcome with the session.
func (s *Server) runPlan(ctx context.Context, sess *Session, run *planRun, spec monitor.PlanSpec, req planRequest) {
	defer close(run.done)
	defer run.cancel()
	t0 := time.Now()
	var last time.Time
	spec.Progress = func(done, total int) {
		if total <= 0 {
			return
		}
		now := time.Now()
		if now.Sub(last) < planProgGap && done < total {
			return
		}
		last = now
		f := float64(done) / float64(total)
		run.mu.Lock()
		run.rec.Progress = f
		run.mu.Unlock()
		publishPlan(sess, "running", f, "")
	}
	publishPlan(sess, "running", 0, "")
	var (
		res  []monitor.PlanResult
		cmp  []modelCompare
		err  error
		note string
	)
	if req.Model == "bootstrap" {
		var boot [][]float32
		boot, note, err = s.planBootFrames(ctx, sess, req.Tile, spec.Width, spec.Height)
		if err == nil {
			res, cmp, err = planBootstrap(ctx, spec, boot)
		}
	} else {
		note = "limits and delays simulated with independent standard normal noise (the plan command's model)"
		res, err = monitor.Plan(ctx, spec)
	}
	run.mu.Lock()
	// The outcome is built on a copy and saved before the planner shows it
	// as done, so a reader that sees "done" also finds plan.json.
	rec := run.rec
	run.mu.Unlock()
	rec.Seconds = time.Since(t0).Seconds()
	switch {
	case err == nil:
		rec.State, rec.Progress = "done", 1
		rec.Results = planRows(res, cmp)
		rec.ModelNote = compareNote(rec.Results, req.ARL0)
		rec.Note = fmt.Sprintf("%s; %d delay runs and %d calibration paths per policy and budget, seed %d", note, req.Runs, req.Paths, req.Seed)
		a := advise(rec.Results, req.TargetDelay)
		rec.Advice = &a
	case ctx.Err() != nil:
		rec.State, rec.Message = "cancelled", "cancelled"
	default:
		rec.State, rec.Message = "failed", strings.TrimPrefix(trimPrefix(err.Error()), "plan: ")
	}
	if rec.State == "done" {
		if data, err := json.MarshalIndent(rec, "", "  "); err == nil {
			if err := writeFileSync(filepath.Join(sess.dir, planFileName), append(data, '\n')); err != nil {
				sess.log.Error("plan not saved", "err", err)
			}
		}
	} else if rec.State == "failed" {
		sess.log.Warn("plan failed", "err", err)
	}
	run.mu.Lock()
	rec.Progress = max(rec.Progress, run.rec.Progress)
	run.rec = rec
	run.mu.Unlock()
	publishPlan(sess, rec.State, rec.Progress, rec.Message)
}

// publishPlan tells the session's viewers how the planner is doing.
func publishPlan(sess *Session, state string, progress float64, msg string) {
	b, err := json.Marshal(struct {
		Type     string  `json:"type"`
		State    string  `json:"state"`
		Progress float64 `json:"progress"`
		Message  string  `json:"message,omitempty"`
	}{"plan", state, progress, msg})
	if err == nil {
		sess.hub.publishEvent(b)
	}
}

func loadPlan(dir string) (planRecord, bool) {
	var rec planRecord
	data, err := os.ReadFile(filepath.Join(dir, planFileName))
	if err != nil || json.Unmarshal(data, &rec) != nil {
		return rec, false
	}
	return rec, true
}

// finiteOr turns NaN and infinities into -1 so JSON stays valid.
func finiteOr(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return -1
	}
	return v
}

// planRows turns the planner's results into rows; cmp, when not nil, holds
// the normal-model comparison of each result.
func planRows(res []monitor.PlanResult, cmp []modelCompare) []planRow {
	out := make([]planRow, 0, len(res))
	for i, r := range res {
		row := planRow{Policy: string(r.Policy), Budget: r.Budget, Streams: r.Streams, Limit: finiteOr(r.Limit),
			ARL0: finiteOr(r.ARL0), ARL0SE: finiteOr(r.ARL0SE), ADD: finiteOr(r.ADD), ADDSE: finiteOr(r.ADDSE),
			FalseAlarms: r.FalseAlarms, Missed: r.Missed, Note: r.Note}
		if i < len(cmp) {
			c := cmp[i]
			row.NormalLimit, row.NormalARL0, row.NormalARL0SE = finiteOr(c.NormalLimit), finiteOr(c.NormalARL0), finiteOr(c.NormalARL0SE)
		}
		out = append(out, row)
	}
	return out
}

// budgetFree says whether a policy's result is the same at every budget
// (full reads everything, oracle exactly the changed streams).
func budgetFree(policy string) bool {
	return policy == string(monitor.Full) || policy == string(monitor.Oracle)
}

// compareNote sets the bootstrap limits beside the normal model's and says
// why they differ, from the ARL0 each normal-model limit gives on the
// bootstrap of the reference frames. Empty when no row has a comparison.
func compareNote(rows []planRow, target float64) string {
	var lo, hi, within, under, over, n int
	seen := map[string]bool{} // full and oracle come once, whatever the budgets
	for i, r := range rows {
		if !(r.NormalLimit > 0) || !(r.NormalARL0 > 0) {
			continue
		}
		if budgetFree(r.Policy) {
			if seen[r.Policy] {
				continue
			}
			seen[r.Policy] = true
		}
		n++
		if n == 1 || r.NormalARL0 < rows[lo].NormalARL0 {
			lo = i
		}
		if n == 1 || r.NormalARL0 > rows[hi].NormalARL0 {
			hi = i
		}
		switch d := r.NormalARL0 - target; {
		case math.Abs(d) <= 2*r.NormalARL0SE:
			within++
		case d < 0:
			under++
		default:
			over++
		}
	}
	if n == 0 {
		return ""
	}
	var b strings.Builder
	l, h := rows[lo], rows[hi]
	name := func(r planRow) string {
		if budgetFree(r.Policy) {
			return r.Policy
		}
		return r.Policy + " at " + pct(r.Budget)
	}
	if lo == hi {
		fmt.Fprintf(&b, "Normal model against the bootstrap of the reference frames: the normal-model limit %.4g (bootstrap: %.4g) would give an ARL0 of %.3g ± %.2g (%s) on these frames, against the target %g.",
			l.NormalLimit, l.Limit, l.NormalARL0, l.NormalARL0SE, name(l), target)
	} else {
		fmt.Fprintf(&b, "Normal model against the bootstrap of the reference frames: the normal-model limits would give an ARL0 of %.3g ± %.2g (%s) to %.3g ± %.2g (%s) on these frames, against the target %g.",
			l.NormalARL0, l.NormalARL0SE, name(l), h.NormalARL0, h.NormalARL0SE, name(h), target)
	}
	switch {
	case within == n:
		b.WriteString(" That is the target within two standard errors everywhere: once standardised by the reference model, these frames behave like independent normal noise at this tile size, and the two limits differ only by simulation noise.")
	case under >= over:
		fmt.Fprintf(&b, " In %d of %d cases the normal-model limit alarms more often than asked: the real values have heavier tails, spatial correlation or slow drift that independent normal noise lacks, so the bootstrap limit is higher and holds the false-alarm rate the normal model would miss.", under, n)
	default:
		fmt.Fprintf(&b, " In %d of %d cases the normal-model limit alarms less often than asked: the real standardised values are lighter in the far tail than a normal (values clipped, quantised or smoothed by the tile means), so the bootstrap limit is lower and catches changes sooner at the same false-alarm rate.", over, n)
	}
	b.WriteString(" Both models assume the scene stays as the reference frames showed it; a drift beyond what they held raises false alarms under either limit.")
	return b.String()
}

// advise picks, among the sampling policies (not full, not oracle), the
// smallest budget whose ADD meets target; between policies the smaller
// budget wins, then the smaller ADD. With no target (0) it picks the
// smallest ADD. It says how far the pick is from full observation and
// from the location-known bound (oracle).
func advise(rows []planRow, target float64) planAdvice {
	var a planAdvice
	var full, oracle float64
	for _, r := range rows {
		switch r.Policy {
		case string(monitor.Full):
			if r.ADD > 0 {
				full = r.ADD
			}
		case string(monitor.Oracle):
			if r.ADD > 0 {
				oracle = r.ADD
			}
		}
	}
	a.FullADD, a.OracleADD = full, oracle
	var best *planRow
	better := func(r *planRow) bool {
		if best == nil {
			return true
		}
		if target > 0 && r.Streams != best.Streams {
			return r.Streams < best.Streams
		}
		return r.ADD < best.ADD
	}
	for i := range rows {
		r := &rows[i]
		if budgetFree(r.Policy) || !(r.ADD > 0) {
			continue
		}
		if target > 0 && r.ADD > target {
			continue
		}
		if better(r) {
			best = r
		}
	}
	if best == nil {
		switch {
		case target > 0 && full > 0 && full <= target:
			a.Text = fmt.Sprintf("No budget tried meets a delay of %g frames; reading every pixel does (%.3g frames). Try larger budgets.", target, full)
		case target > 0:
			a.Text = fmt.Sprintf("No budget tried meets a delay of %g frames, not even reading every pixel; a smaller change cannot be caught that fast at this false-alarm rate.", target)
		default:
			a.Text = "No sampling policy was run (only full or oracle)."
		}
		return a
	}
	a.Met = target > 0
	a.Policy, a.Budget, a.Streams, a.ADD = best.Policy, best.Budget, best.Streams, best.ADD
	if full > 0 {
		a.VsFull = best.ADD / full
	}
	if oracle > 0 {
		a.VsOracle = best.ADD / oracle
	}
	a.ReadVsFull = best.Budget
	var b strings.Builder
	if target > 0 {
		fmt.Fprintf(&b, "Read %s of the pixels per frame (%d streams) with %s: average delay %.3g frames, within the %g asked for.",
			pct(best.Budget), best.Streams, best.Policy, best.ADD, target)
	} else {
		fmt.Fprintf(&b, "Shortest delay: %s at %s (%d streams), %.3g frames.", best.Policy, pct(best.Budget), best.Streams, best.ADD)
	}
	if full > 0 {
		fmt.Fprintf(&b, " Reading every pixel: %.3g frames (this budget's delay is %.2f times that).", full, a.VsFull)
	}
	if oracle > 0 {
		fmt.Fprintf(&b, " Reading exactly the changed pixels (the bound when the place is known): %.3g frames (%.2f times that).", oracle, a.VsOracle)
	}
	a.Text = b.String()
	return a
}

func pct(f float64) string { return fmt.Sprintf("%.3g%%", 100*f) }

// planBootFrames reads the session's reference frames again, learns the
// session's model from them on the planner's tile grid and returns them
// standardised with it: the bootstrap pool. The note says which model was
// used.
func (s *Server) planBootFrames(ctx context.Context, sess *Session, tile, gw, gh int) ([][]float32, string, error) {
	m := sess.metaCopy()
	n := m.Params.ReferenceFrames
	src, _, err := s.openSource(sess.dir, m.Source)
	if err != nil {
		return nil, "", err
	}
	defer src.Close()
	check := func(t *frames.Tiler) error {
		if t.GW != gw || t.GH != gh {
			return errorf(KindInvalid, "plan: a bootstrap needs the session's frame size (%d x %d pixels, %d x %d streams at tile %d)", t.W, t.H, t.GW, t.GH, tile)
		}
		if int64(t.Streams())*int64(n) > planBootMax {
			return errorf(KindInvalid, "plan: %d reference frames of %d streams are too many for a bootstrap; use a larger tile", n, t.Streams())
		}
		return nil
	}
	raw, _, err := review.BootstrapFrames(ctx, src, tile, n, monitor.ModelKind(m.Params.Model), check)
	if errors.Is(err, review.ErrTooFewReference) {
		return nil, "", errorf(KindInvalid, "plan: the session has %v", err)
	}
	if err != nil {
		return nil, "", err
	}
	how := fmt.Sprintf("standardised with its %s model", m.Params.Model)
	if monitor.ModelKind(m.Params.Model) == monitor.SelfStart {
		how = fmt.Sprintf("each scored by its self-start model against the frames before it (the first %d of %d only start it)", n-len(raw), n)
	}
	note := fmt.Sprintf("limits calibrated on a block bootstrap of the session's %d reference frames, %s (real noise, spatial correlation and drift); delays simulated with independent standard normal noise at those limits", len(raw), how)
	return raw, note, nil
}

// planBootstrap is monitor.Plan with each limit calibrated on the
// bootstrap frames instead of the normal model (PlanSpec has no bootstrap
// field); the delays are then simulated as Plan does, at those limits.
// Seeds follow Plan's, so with the normal model the two would agree.
//
// Each row also gets the normal model's limit (the one Plan finds) and the
// ARL0 that limit gives on the bootstrap, so the report can say how far
// the normal model would be off on these frames.
func planBootstrap(ctx context.Context, spec monitor.PlanSpec, boot [][]float32) ([]monitor.PlanResult, []modelCompare, error) {
	m := spec.Width * spec.Height
	disk := monitor.Disk(spec.Width, spec.Height, spec.Width/2, spec.Height/2, spec.Radius)
	type job struct {
		p monitor.Policy
		q int
	}
	var jobs []job
	for _, b := range spec.Budgets {
		q, err := monitor.BudgetStreams(b, m)
		if err != nil {
			return nil, nil, err
		}
		for _, p := range spec.Policies {
			jobs = append(jobs, job{p, q})
		}
	}
	perJob := 5*spec.Paths + spec.Runs // bootstrap and normal calibrations, a check, the delay runs
	total := perJob * len(jobs)
	prog := func(base int) func(int, int) {
		return func(d, _ int) {
			if spec.Progress != nil {
				spec.Progress(base+d, total)
			}
		}
	}
	type kept struct {
		r monitor.PlanResult
		c modelCompare
	}
	cache := map[monitor.Policy]kept{}
	var (
		out []monitor.PlanResult
		cmp []modelCompare
	)
	for n, j := range jobs {
		base := n * perJob
		if k, ok := cache[j.p]; ok {
			k.r.Budget, k.r.Streams = float64(j.q)/float64(m), j.q
			out, cmp = append(out, k.r), append(cmp, k.c)
			prog(base)(perJob, total)
			continue
		}
		cfg := monitor.Config{Width: spec.Width, Height: spec.Height, Budget: j.q, TopR: spec.TopR, Shift: spec.Shift,
			Policy: j.p, CompFraction: spec.CompFraction, Compensation: spec.Compensation}
		switch j.p {
		case monitor.Full:
			cfg.Budget = m
		case monitor.Oracle:
			cfg.Oracle, cfg.Budget = disk, len(disk)
			cfg.Compensation, cfg.CompFraction = 1e-12, 0
			cfg.TopR = min(cfg.TopR, cfg.Budget)
		}
		seed := spec.Seed ^ uint64(n+1)*0x9e3779b97f4a7c15
		cal, err := monitor.Calibrate(ctx, monitor.CalibrationSpec{Config: cfg, TargetARL0: spec.ARL0, Paths: spec.Paths,
			Bootstrap: boot, Seed: seed, Progress: prog(base)})
		if err != nil {
			return nil, nil, fmt.Errorf("plan %s at budget %d: %w", j.p, j.q, err)
		}
		c, err := compareNormal(ctx, cfg, spec, boot, seed, prog(base+2*spec.Paths))
		if err != nil {
			return nil, nil, fmt.Errorf("plan %s at budget %d: %w", j.p, j.q, err)
		}
		cfg.Limit = cal.Limit
		sc := monitor.Scenario{Width: spec.Width, Height: spec.Height, Radius: spec.Radius, Shift: spec.Shift,
			Burnin: cal.Burnin, Quiet: min(cal.Burnin, 1000), Runs: spec.Runs, Seed: spec.Seed}
		res, err := monitor.Simulate(ctx, sc, []monitor.Config{cfg}, prog(base+5*spec.Paths))
		if err != nil {
			return nil, nil, fmt.Errorf("plan %s at budget %d: %w", j.p, j.q, err)
		}
		d := res[0]
		r := monitor.PlanResult{Policy: j.p, Budget: float64(j.q) / float64(m), Streams: j.q, Limit: cal.Limit,
			ARL0: cal.VerifiedARL0, ARL0SE: cal.VerifiedSE, ADD: d.ADD, ADDSE: d.ADDSE,
			FalseAlarms: d.FalseAlarms, Missed: d.Missed, Note: cal.Note}
		if budgetFree(string(j.p)) {
			cache[j.p] = kept{r, c}
		}
		out, cmp = append(out, r), append(cmp, c)
	}
	return out, cmp, nil
}

// modelCompare is a bootstrap row's normal-model counterpart.
type modelCompare struct {
	NormalLimit              float64 // the normal model's limit for the same target
	NormalARL0, NormalARL0SE float64 // that limit's ARL0 on the bootstrap frames
}

// compareNormal calibrates cfg on the normal model (as Plan does, same
// seed) and measures the ARL0 that limit gives on the bootstrap frames,
// counting at most 4 x the target frames per path (censored paths count
// their frames, as the calibration does).
func compareNormal(ctx context.Context, cfg monitor.Config, spec monitor.PlanSpec, boot [][]float32, seed uint64, prog func(int, int)) (modelCompare, error) {
	var c modelCompare
	cal, err := monitor.Calibrate(ctx, monitor.CalibrationSpec{Config: cfg, TargetARL0: spec.ARL0, Paths: spec.Paths,
		Seed: seed, Progress: prog})
	if err != nil {
		return c, fmt.Errorf("normal-model limit: %w", err)
	}
	c.NormalLimit = cal.Limit
	v, err := monitor.Verify(ctx, monitor.VerifySpec{Config: cfg, Limit: cal.Limit, Paths: spec.Paths,
		Horizon: int(math.Ceil(4 * spec.ARL0)), Bootstrap: boot, Seed: seed + 7,
		Progress: func(d, t int) { prog(2*spec.Paths+d, t) }})
	if err != nil {
		return c, fmt.Errorf("normal-model limit on the bootstrap: %w", err)
	}
	c.NormalARL0, c.NormalARL0SE = v.ARL0, v.SE
	return c, nil
}
