package server

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"strconv"
	"sync"
	"time"

	"sparsewatch/server/review"
)

// Session states, as shown in status JSON.
const (
	StateQueued      = "queued"
	StateLearning    = "learning"
	StateCalibrating = "calibrating"
	StateWatching    = "watching"
	StateAlarm       = "alarm"
	StateFinished    = "finished"
	StateFailed      = "failed"
	StateStopped     = "stopped"
)

const (
	maxErrors     = 200     // frame errors kept per session
	maxHistory    = 1 << 15 // chart points kept; older ones are thinned 2:1
	previewPeriod = 200 * time.Millisecond
	publishGap    = minFrameGap / 2
	heatPeriod    = 200 * time.Millisecond
	reportFile    = "report.json"
)

// FrameError is a frame that could not be used; the review goes on without it.
type FrameError struct {
	File    string `json:"file,omitempty"`
	Frame   int    `json:"frame"`
	Message string `json:"message"`
}

// Calibration is the outcome (or progress) of setting the control limit.
type Calibration struct {
	Progress     float64 `json:"progress"`
	Limit        float64 `json:"limit,omitempty"`
	ARL0         float64 `json:"arl0,omitempty"`
	ARL0SE       float64 `json:"arl0_se,omitempty"`
	Model        string  `json:"model,omitempty"`
	Extrapolated bool    `json:"extrapolated,omitempty"`
	Note         string  `json:"note,omitempty"`
}

// Status is what GET /api/sessions/{id} answers.
type Status struct {
	ID          string       `json:"id"`
	Name        string       `json:"name"`
	Created     time.Time    `json:"created"`
	Source      string       `json:"source"`
	State       string       `json:"state"`
	FramesSeen  int          `json:"frames_seen"`
	FramesTotal int          `json:"frames_total"`
	Frame       int          `json:"frame"` // last frame index reviewed, -1 before the first
	G           float64      `json:"g"`
	Limit       float64      `json:"limit"`
	Alarms      int          `json:"alarms"`
	Errors      []FrameError `json:"errors"`
	Params      Params       `json:"params"`
	Width       int          `json:"width"`
	Height      int          `json:"height"`
	GridW       int          `json:"grid_w"`
	GridH       int          `json:"grid_h"`
	Tile        int          `json:"tile"`
	Budget      int          `json:"budget"` // streams read per frame
	Calibration *Calibration `json:"calibration,omitempty"`
	Message     string       `json:"message,omitempty"` // why it failed
	// FramesPerSecond is the review's speed over the watched frames so far
	// (frame loop only: reference learning and calibration excluded).
	FramesPerSecond float64 `json:"frames_per_second"`
	ShareURL        string  `json:"share_url,omitempty"` // owner requests only
	// Live is set for live sessions (camera URL, watched folder, browser
	// camera, standard input): rates, drops, latency, the ARL0 used.
	Live *LiveStatus `json:"live,omitempty"`
}

// Session is one review: its metadata, live status, chart history and the
// goroutine that runs the review. The review goroutine alone owns the
// engine; everything viewers see passes through mu or the hub.
type Session struct {
	srv *Server
	dir string
	hub *hub
	log *slog.Logger

	ctl sync.Mutex // serialises parameter changes (stop, archive, start)

	mu            sync.Mutex // guards the fields below
	meta          meta
	st            Status
	histFrame     []int32
	histG         []float32
	histStep      int // thinning: keep one point in histStep
	alarms        []reportAlarm
	report        *Report
	logged        map[string]bool // alarm events already in alarms.jsonl ("start:F", "end:F")
	lastRefStatus time.Time
	names         []string // upload's frame files in review order, listed on first need
	cancel        context.CancelFunc
	done          chan struct{}

	// Owned by the review goroutine.
	run         *runState
	resumeAfter int       // frames <= resumeAfter are already in stats.csv: replay them silently
	hookErr     error     // first persistence error inside a review hook
	heatAt      time.Time // last heat image sent (review goroutine only)
	heatBuf     []float32

	previews *previewer

	feed *liveFeed // live sessions only, made on first need (live.go); guarded by mu
}

// runState is the review goroutine's private state for one run.
type runState struct {
	alarms      *alarmLog
	stats       *statsLog
	enc         *maskEncoder
	buf         []byte
	lastPreview time.Time
	lastPublish time.Time
	lastWire    byte
	paceStart   time.Time
	paceFrames  int
	watchStart  time.Time // first watched frame of this process
	watched     int       // watched frames since watchStart
}

func newSession(srv *Server, dir string, m meta) *Session {
	s := &Session{srv: srv, dir: dir, hub: newHub(), meta: m, logged: map[string]bool{}}
	s.previews = newPreviewer(s)
	s.log = srv.log.With("session", m.ID)
	s.resetStatus()
	return s
}

// resetStatus starts the status and history over (new run).
func (s *Session) resetStatus() {
	s.st = Status{
		ID: s.meta.ID, Name: s.meta.Name, Created: s.meta.Created, Source: s.meta.Source.Kind,
		State: StateQueued, Frame: -1, Params: s.meta.Params, Errors: []FrameError{},
		Tile: s.meta.Params.Tile,
	}
	s.histFrame, s.histG, s.histStep = nil, nil, 1
	s.alarms, s.report = nil, nil
	s.logged = map[string]bool{}
	s.resumeAfter = -1
}

// metaCopy returns session.json's content.
func (s *Session) metaCopy() meta {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.meta
}

// Status returns a copy of the session's status.
func (s *Session) Status() Status {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.statusLocked()
}

func (s *Session) statusLocked() Status {
	st := s.st
	st.Errors = append([]FrameError(nil), s.st.Errors...)
	st.Alarms = len(s.alarms)
	if s.st.Calibration != nil {
		c := *s.st.Calibration
		st.Calibration = &c
	}
	if s.feed != nil {
		l := s.feed.status()
		st.Live = &l
	}
	return st
}

// Report returns the report so far (final once the state is finished).
func (s *Session) Report() Report {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.report != nil {
		r := *s.report
		r.Alarms = append([]reportAlarm{}, s.report.Alarms...)
		return r
	}
	// Still running: what is known so far, in the same schema.
	r := Report{
		Width: s.st.Width, Height: s.st.Height, Streams: s.st.GridW * s.st.GridH,
		Budget: s.st.Budget, ControlLimit: s.st.Limit, Frames: s.st.FramesSeen,
		Alarms: append([]reportAlarm{}, s.alarms...), Policy: s.meta.Params.Policy,
		Tile: s.st.Tile, GridWidth: s.st.GridW, GridHeight: s.st.GridH, Errors: []review.FileError{},
	}
	for _, e := range s.st.Errors {
		r.Errors = append(r.Errors, review.FileError{Frame: e.Frame, File: e.File, Reason: e.Message})
	}
	return r
}

// Alarms returns a copy of the alarms so far.
func (s *Session) Alarms() []reportAlarm {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]reportAlarm{}, s.alarms...)
}

// start launches the review goroutine.
func (s *Session) start(parent context.Context) {
	ctx, cancel := context.WithCancel(parent)
	done := make(chan struct{})
	s.mu.Lock()
	s.cancel, s.done = cancel, done
	s.mu.Unlock()
	go func() {
		defer close(done)
		s.runReview(ctx)
	}()
}

// stop cancels the review goroutine and waits for it.
func (s *Session) stop() {
	s.mu.Lock()
	cancel, done := s.cancel, s.done
	s.mu.Unlock()
	if cancel != nil {
		cancel()
		<-done
	}
}

// runReview prepares the logs (and the resume point after a restart), runs
// the review and records how it ended.
func (s *Session) runReview(ctx context.Context) {
	err := s.openRun()
	if err == nil {
		var rep *Report
		review := s.srv.review
		if isLiveKind(s.metaCopy().Source.Kind) {
			review = liveReview
		}
		rep, err = review(ctx, s)
		if err == nil && s.hookErr != nil {
			err = s.hookErr
		}
		if err == nil && rep != nil {
			err = s.finish(*rep)
		}
	}
	s.closeRun()
	switch {
	case err == nil:
	case ctx.Err() != nil:
		s.setState(StateStopped, "")
	default:
		s.log.Error("review failed", "err", err)
		msg := "review failed"
		var e *Error
		if errors.As(err, &e) && e.Kind != KindInternal {
			msg = e.Msg
		}
		s.setState(StateFailed, msg)
	}
}

// openRun opens the logs and, when a previous process left them, sets the
// resume point: frames already in stats.csv are replayed without logging,
// alarm events already in alarms.jsonl are not written twice.
func (s *Session) openRun() error {
	rows, err := readStats(s.dir)
	if err != nil {
		return err
	}
	evs, err := readAlarmEvents(s.dir)
	if err != nil {
		return err
	}
	s.mu.Lock()
	for _, ev := range evs {
		s.logged[ev.Event+":"+strconv.Itoa(ev.Alarm.Frame)] = true
		s.mergeAlarm(ev.Alarm)
	}
	s.mu.Unlock()
	if n := len(rows); n > 0 {
		s.resumeAfter = rows[n-1].Frame
		s.log.Info("resuming review", "after_frame", s.resumeAfter, "alarms_logged", len(evs))
	}
	run := &runState{}
	if run.alarms, err = openAlarmLog(s.dir); err != nil {
		return err
	}
	if run.stats, err = openStatsLog(s.dir); err != nil {
		run.alarms.close()
		return err
	}
	s.run = run
	s.hookErr = nil
	return nil
}

func (s *Session) closeRun() {
	if s.run == nil {
		return
	}
	s.run.alarms.close()
	s.run.stats.close()
	s.run = nil
}

// mergeAlarm inserts a or updates the alarm with the same start frame.
// Callers hold mu.
func (s *Session) mergeAlarm(a reportAlarm) {
	for i := range s.alarms {
		if s.alarms[i].Frame == a.Frame {
			if a.EndFrame >= 0 || s.alarms[i].EndFrame < 0 {
				s.alarms[i] = a
			}
			return
		}
	}
	s.alarms = append(s.alarms, a)
}

// finish stores the final report.
func (s *Session) finish(rep Report) error {
	data, err := json.MarshalIndent(rep, "", "  ")
	if err != nil {
		return fmt.Errorf("server: encode report: %w", err)
	}
	if err := writeFileSync(filepath.Join(s.dir, reportFile), append(data, '\n')); err != nil {
		return err
	}
	s.mu.Lock()
	s.report = &rep
	s.st.State = StateFinished
	s.publishStatusLocked()
	s.mu.Unlock()
	s.publishFinalFrame()
	return nil
}

// publishFinalFrame re-sends the last frame update with the finished state.
func (s *Session) publishFinalFrame() {
	st := s.Status()
	if s.hub.count.Load() == 0 || st.GridW == 0 {
		return
	}
	enc := newMaskEncoder(st.GridW, st.GridH)
	s.hub.publish(msgFrame, enc.encode(nil, wireFinished, max(st.Frame, 0), st.G, st.Limit, nil, nil))
}

// loadFinished restores a finished session from its report and stats.
func (s *Session) loadFinished() (bool, error) {
	data, err := os.ReadFile(filepath.Join(s.dir, reportFile))
	if os.IsNotExist(err) {
		return false, nil
	}
	if err != nil {
		return false, fmt.Errorf("server: read report: %w", err)
	}
	var rep Report
	if err := json.Unmarshal(data, &rep); err != nil {
		return false, fmt.Errorf("server: %s: %w", reportFile, err)
	}
	rows, err := readStats(s.dir)
	if err != nil {
		return false, err
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	s.report = &rep
	s.alarms = append([]reportAlarm{}, rep.Alarms...)
	for _, r := range rows {
		s.addHistoryLocked(r.Frame, r.G)
	}
	s.st.State = StateFinished
	s.st.Width, s.st.Height, s.st.Budget, s.st.Limit = rep.Width, rep.Height, rep.Budget, rep.ControlLimit
	s.st.Frame, s.st.FramesSeen, s.st.FramesTotal = rep.Frames-1, len(rows), rep.Frames
	k := max(s.meta.Params.Tile, 1)
	s.st.GridW, s.st.GridH = (rep.Width+k-1)/k, (rep.Height+k-1)/k
	if n := len(rows); n > 0 {
		s.st.G = rows[n-1].G
	}
	return true, nil
}

func (s *Session) addHistoryLocked(frame int, g float64) {
	if frame%s.histStep != 0 {
		return
	}
	if n := len(s.histFrame); n > 0 && int(s.histFrame[n-1]) >= frame {
		return // replayed frame already charted
	}
	s.histFrame = append(s.histFrame, int32(frame))
	s.histG = append(s.histG, float32(g))
	if len(s.histFrame) >= maxHistory {
		s.histStep *= 2
		j := 0
		for i, f := range s.histFrame {
			if int(f)%s.histStep == 0 {
				s.histFrame[j], s.histG[j] = f, s.histG[i]
				j++
			}
		}
		s.histFrame, s.histG = s.histFrame[:j], s.histG[:j]
	}
}

// --- called by the review loop (one goroutine) ---

// setState changes the state and tells the viewers.
func (s *Session) setState(state, message string) {
	s.mu.Lock()
	s.st.State = state
	if message != "" {
		s.st.Message = message
	}
	s.publishStatusLocked()
	s.mu.Unlock()
}

// setGeometry records the frame and stream-grid sizes once they are known.
func (s *Session) setGeometry(w, h, tile, budget, total int) {
	s.mu.Lock()
	s.st.Width, s.st.Height, s.st.Tile, s.st.Budget = w, h, tile, budget
	s.st.GridW, s.st.GridH = (w+tile-1)/tile, (h+tile-1)/tile
	s.st.FramesTotal = total
	s.publishStatusLocked()
	s.mu.Unlock()
	if s.run != nil {
		s.run.enc = newMaskEncoder(s.st.GridW, s.st.GridH)
	}
}

// setCalibration records calibration progress or its result.
func (s *Session) setCalibration(c Calibration) {
	s.mu.Lock()
	s.st.Calibration = &c
	if c.Limit > 0 {
		s.st.Limit = c.Limit
	}
	msg, _ := json.Marshal(struct {
		Type string `json:"type"`
		Calibration
	}{"calibration", c})
	s.hub.publishEvent(msg)
	s.mu.Unlock()
}

// frameError lists a frame that could not be used.
func (s *Session) frameError(file string, frame int, err error) {
	s.log.Warn("frame skipped", "file", file, "frame", frame, "err", err)
	s.mu.Lock()
	if len(s.st.Errors) < maxErrors {
		s.st.Errors = append(s.st.Errors, FrameError{File: file, Frame: frame, Message: err.Error()})
	}
	s.publishStatusLocked()
	s.mu.Unlock()
}

func (s *Session) publishStatusLocked() {
	msg, err := json.Marshal(struct {
		Type    string `json:"type"`
		Session Status `json:"session"`
	}{"status", s.statusLocked()})
	if err == nil {
		s.hub.publishEvent(msg)
	}
}

// frameUpdate is one watched frame as the review reports it. Slices may
// be the engine's: they are used before onFrame returns.
type frameUpdate struct {
	Frame      int
	Name       string // file the frame came from (for previews)
	G, Limit   float64
	Alarm      bool
	Read       []int32 // streams read (stream-grid indices)
	Regions    []box   // current regions, source pixels
	PixelsRead int64
}

// onFrame records a frame: status, chart, stats.csv, the viewers' slots,
// and the pace of an offline review. It returns ctx's error when stopped.
func (s *Session) onFrame(ctx context.Context, fu frameUpdate) error {
	replay := fu.Frame <= s.resumeAfter
	state, wire := StateWatching, byte(wireWatching)
	if fu.Alarm {
		state, wire = StateAlarm, wireAlarm
	}
	run := s.run
	s.mu.Lock()
	changed := s.st.State != state
	s.st.State, s.st.Frame, s.st.G, s.st.Limit = state, fu.Frame, fu.G, fu.Limit
	s.st.FramesSeen++
	s.addHistoryLocked(fu.Frame, fu.G)
	if run.watchStart.IsZero() {
		run.watchStart = time.Now()
	} else {
		run.watched++
		s.st.FramesPerSecond = float64(run.watched) / time.Since(run.watchStart).Seconds()
	}
	if changed {
		s.publishStatusLocked()
	}
	s.mu.Unlock()
	if !replay {
		if err := run.stats.append(statsRow{Frame: fu.Frame, G: fu.G, Limit: fu.Limit, PixelsRead: int(fu.PixelsRead)}); err != nil {
			return err
		}
	}
	// Viewers take at most one frame update per minFrameGap, so a fast
	// review encodes and publishes one every publishGap (and every change
	// of state) instead of every frame.
	if s.hub.count.Load() > 0 && run.enc != nil {
		now := time.Now()
		if wire == run.lastWire && now.Sub(run.lastPublish) < publishGap {
			return s.next(ctx, replay)
		}
		run.lastWire, run.lastPublish = wire, now
		run.buf = run.enc.encode(make([]byte, 0, frameHeaderLen+len(run.buf)), wire, fu.Frame, fu.G, fu.Limit, fu.Read, fu.Regions)
		s.hub.publish(msgFrame, run.buf)
		if now.Sub(run.lastPreview) >= previewPeriod {
			run.lastPreview = now
			s.previews.request(previewReq{frame: fu.Frame, name: fu.Name})
		}
	}
	return s.next(ctx, replay)
}

// next returns when the review may go on to the next frame.
func (s *Session) next(ctx context.Context, replay bool) error {
	if replay {
		return ctx.Err()
	}
	return s.pace(ctx)
}

// setTotal records how many frames the source expects (-1 unknown).
func (s *Session) setTotal(n int) {
	s.mu.Lock()
	s.st.FramesTotal = max(n, 0)
	s.mu.Unlock()
}

// setReference reports reference learning progress (at most a few
// status messages a second).
func (s *Session) setReference(done, total int) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.st.State = StateLearning
	s.st.FramesSeen = done
	if now := time.Now(); done == total || now.Sub(s.lastRefStatus) >= previewPeriod {
		s.lastRefStatus = now
		s.publishStatusLocked()
	}
}

// pace sleeps so an offline review runs at Params.Pace frames per second.
func (s *Session) pace(ctx context.Context) error {
	p := s.meta.Params.Pace // meta.Params only changes while no run is active
	if p <= 0 || isLiveKind(s.meta.Source.Kind) {
		return ctx.Err()
	}
	run := s.run
	now := time.Now()
	if run.paceStart.IsZero() || now.Sub(run.paceStart) > time.Duration(float64(run.paceFrames+2)/p*float64(time.Second)) {
		run.paceStart, run.paceFrames = now, 0 // first frame, or we fell behind: restart the clock
	}
	run.paceFrames++
	due := run.paceStart.Add(time.Duration(float64(run.paceFrames) / p * float64(time.Second)))
	t := time.NewTimer(time.Until(due))
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

// onAlarm records an episode's start (a.EndFrame < 0) or end: fsync'd to
// alarms.jsonl unless a previous process logged it already, then sent to
// the viewers.
func (s *Session) onAlarm(a reportAlarm) error {
	// The review reuses its region slices while the episode is on; keep
	// copies, which viewers and the API read from other goroutines.
	a.Regions = append([]review.Region(nil), a.Regions...)
	a.StartRegions = append([]review.Region(nil), a.StartRegions...)
	ev := "start"
	if a.EndFrame >= 0 {
		ev = "end"
	}
	key := ev + ":" + strconv.Itoa(a.Frame)
	s.mu.Lock()
	already := s.logged[key]
	s.mu.Unlock()
	if !already {
		if err := s.run.alarms.append(alarmEvent{Event: ev, Alarm: a}); err != nil {
			return err
		}
	}
	s.mu.Lock()
	s.logged[key] = true
	s.mergeAlarm(a)
	msg, err := json.Marshal(struct {
		Type  string      `json:"type"`
		Alarm reportAlarm `json:"alarm"`
	}{"alarm", a})
	if err == nil {
		s.hub.publishEvent(msg)
	}
	s.mu.Unlock()
	return nil
}

// hello builds the first message a viewer gets, and registers the viewer
// under the same lock so no alarm falls between history and live events.
func (s *Session) hello(v *viewer, register bool) ([]byte, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	type history struct {
		Frame  []int32       `json:"frame"`
		G      []float32     `json:"g"`
		Limit  float64       `json:"limit"`
		Alarms []reportAlarm `json:"alarms"`
	}
	st := s.statusLocked()
	h := struct {
		Type     string  `json:"type"`
		Role     string  `json:"role"`
		Session  Status  `json:"session"`
		Params   Params  `json:"params"`
		Width    int     `json:"width"`
		Height   int     `json:"height"`
		GridW    int     `json:"grid_w"`
		GridH    int     `json:"grid_h"`
		Tile     int     `json:"tile"`
		History  history `json:"history"`
		ShareURL string  `json:"share_url,omitempty"`
	}{
		Type: "hello", Role: v.role, Session: st, Params: s.meta.Params,
		Width: st.Width, Height: st.Height, GridW: st.GridW, GridH: st.GridH, Tile: st.Tile,
		History: history{Frame: s.histFrame, G: s.histG, Limit: st.Limit, Alarms: s.alarms},
	}
	if h.History.Frame == nil {
		h.History.Frame, h.History.G = []int32{}, []float32{}
	}
	if h.History.Alarms == nil {
		h.History.Alarms = []reportAlarm{}
	}
	if v.role == roleOwner {
		h.ShareURL = s.srv.shareURL(s.meta.ShareToken)
	}
	msg, err := json.Marshal(h)
	if err != nil {
		return nil, fmt.Errorf("server: encode hello: %w", err)
	}
	if register {
		s.hub.add(v)
	}
	return msg, nil
}

// setParams restarts the review with new parameters; the previous run's
// logs are archived under runs/<n>/.
func (s *Session) setParams(ctx context.Context, p Params) error {
	s.ctl.Lock()
	defer s.ctl.Unlock()
	if ctx.Err() != nil {
		return errorf(KindUnavailable, "the server is stopping")
	}
	s.stop()
	s.mu.Lock()
	m := s.meta
	s.mu.Unlock()
	if err := archiveRun(s.dir, m.Run); err != nil {
		return err
	}
	os.Remove(filepath.Join(s.dir, reportFile))
	m.Params, m.Run = p, m.Run+1
	if err := saveMeta(s.dir, m); err != nil {
		return err
	}
	s.mu.Lock()
	s.meta = m
	s.resetStatus()
	s.publishStatusLocked()
	s.mu.Unlock()
	s.start(ctx)
	return nil
}
