package server

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"time"

	"sparsewatch/frames"
	"sparsewatch/frames/live"
	"sparsewatch/server/review"
)

// Live source kinds (session source "kind").
const (
	kindCameraURL     = "camera-url"     // MJPEG or polled snapshots, under --allow-camera-url
	kindFolder        = "folder"         // a folder inside --watch-root, followed for new files
	kindBrowserCamera = "browser-camera" // JPEG/PNG blobs the owner sends over the websocket
	kindStdin         = "stdin"          // concatenated PNG/JPEG on the server's standard input
)

func isLiveKind(k string) bool {
	switch k {
	case kindCameraURL, kindFolder, kindBrowserCamera, kindStdin:
		return true
	}
	return false
}

const (
	liveFile       = "live.json"
	ingestQueue    = 4   // pushed frames waiting for the review; older ones are dropped
	arrivalRing    = 256 // frames whose arrival time is kept for the latency
	latencySamples = 512 // latencies kept for the median and 95th percentile
	rateWindow     = 5 * time.Second
	maxLiveFPS     = 1000
)

// liveConfig is live.json: where a live session's frames come from and how
// its false-alarm target was set.
type liveConfig struct {
	Kind     string  `json:"kind"`
	URL      string  `json:"url,omitempty"`
	Path     string  `json:"path,omitempty"`
	PerHours float64 `json:"per_hours,omitempty"`
	FPS      float64 `json:"fps,omitempty"`
}

// LiveStatus is the "live" part of a live session's status.
type LiveStatus struct {
	Kind            string  `json:"kind"`
	FramesIn        uint64  `json:"frames_in"`        // good frames that arrived
	FramesMonitored uint64  `json:"frames_monitored"` // frames the engine watched (after the reference)
	Dropped         uint64  `json:"dropped"`          // frames discarded because the review was behind
	Bad             uint64  `json:"bad"`              // parts or files skipped as corrupt
	Reconnects      uint64  `json:"reconnects"`
	FPSIn           float64 `json:"fps_in"`
	FPSMonitored    float64 `json:"fps_monitored"`
	LatencyMedian   float64 `json:"latency_ms_median"` // arrival to engine update, last frames
	LatencyP95      float64 `json:"latency_ms_p95"`
	Reconnecting    bool    `json:"reconnecting"`
	// ARL0 is the in-control run length (frames) the limit targets; with
	// per_hours and fps it is per_hours x 3600 x fps.
	ARL0     float64 `json:"arl0"`
	PerHours float64 `json:"per_hours,omitempty"`
	FPS      float64 `json:"fps,omitempty"`
	ARL0Rule string  `json:"arl0_rule"`
}

// pushed is one frame handed to a live session by a websocket or a pipe:
// encoded bytes, or (from a pipe) an already decoded frame.
type pushed struct {
	name    string
	data    []byte
	frame   *frames.Frame
	err     error
	arrived time.Time
}

// liveFeed is a live session's counters and, for pushed kinds, the queue
// frames wait in. It outlives runs (a parameter change restarts the run).
type liveFeed struct {
	cfg  liveConfig
	q    chan pushed // browser camera and stdin
	drop bool        // a full queue drops its oldest frame (browser camera)

	mu           sync.Mutex
	counts       func() live.Counts // the running camera or folder; nil otherwise
	prev         live.Counts        // totals of earlier runs' sources
	in, dropped  uint64             // pushed kinds
	taken        uint64             // pushed frames the review took from q
	bad          uint64
	monitored    uint64
	reconnecting bool
	arrivedIdx   [arrivalRing]int
	arrivedAt    [arrivalRing]time.Time
	lat          []float64 // ring of latencies in ms
	latNext      int
	samples      []rateSample
	arl0         float64
	endErr       error // why a pipe ended (nil: clean end of input)

	// The latest frame kept for previews: a live frame cannot be read
	// again, so share viewers would otherwise see no picture.
	shotMu    sync.Mutex
	shot      frames.Frame
	shotIndex int
	shotAt    time.Time
}

// keepShot copies frame i for previews, at most once per previewPeriod.
func (f *liveFeed) keepShot(i int, fr *frames.Frame) {
	f.shotMu.Lock()
	defer f.shotMu.Unlock()
	if now := time.Now(); now.Sub(f.shotAt) >= previewPeriod {
		f.shotAt, f.shotIndex = now, i
		f.shot.Width, f.shot.Height, f.shot.Stride = fr.Width, fr.Height, fr.Stride
		f.shot.Pix = append(f.shot.Pix[:0], fr.Pix...)
	}
}

// shotImage encodes the kept frame as a preview message, or fails when no
// frame arrived yet.
func (f *liveFeed) shotImage() ([]byte, error) {
	f.shotMu.Lock()
	defer f.shotMu.Unlock()
	if f.shot.Pix == nil {
		return nil, errors.New("server: no live frame yet")
	}
	return encodePreview(f.shotIndex, gridImage{W: f.shot.Width, H: f.shot.Height, Stride: f.shot.Stride, Pix: f.shot.Pix}), nil
}

type rateSample struct {
	t             time.Time
	in, monitored uint64
}

func newLiveFeed(cfg liveConfig) *liveFeed {
	f := &liveFeed{cfg: cfg}
	for i := range f.arrivedIdx {
		f.arrivedIdx[i] = -1
	}
	switch cfg.Kind {
	case kindBrowserCamera:
		f.q, f.drop = make(chan pushed, ingestQueue), true
	case kindStdin:
		f.q = make(chan pushed, ingestQueue)
	}
	return f
}

// push queues a frame; a full browser-camera queue drops its oldest one
// (push returns how many it dropped). A pipe waits instead (the writer is
// slowed, nothing is lost) until ctx ends.
func (f *liveFeed) push(ctx context.Context, p pushed) (int, error) {
	f.mu.Lock()
	f.in++
	f.mu.Unlock()
	if !f.drop {
		select {
		case f.q <- p:
			return 0, nil
		case <-ctx.Done():
			return 0, ctx.Err()
		}
	}
	dropped := 0
	for {
		select {
		case f.q <- p:
			return dropped, nil
		default:
		}
		select {
		case <-f.q:
			f.mu.Lock()
			f.dropped++
			f.mu.Unlock()
			dropped++
		default:
		}
	}
}

// setSource attaches a camera's or folder's counters for one run.
func (f *liveFeed) setSource(counts func() live.Counts) {
	f.mu.Lock()
	defer f.mu.Unlock()
	if f.counts != nil {
		c := f.counts()
		f.prev.Received += c.Received
		f.prev.Dropped += c.Dropped
		f.prev.Bad += c.Bad
		f.prev.Reconnects += c.Reconnects
	}
	f.counts = counts
}

func (f *liveFeed) event(e live.Event) {
	f.mu.Lock()
	switch e.Kind {
	case live.EventReconnecting:
		f.reconnecting = true
	case live.EventConnected:
		f.reconnecting = false
	}
	f.mu.Unlock()
}

func (f *liveFeed) badFrame() {
	f.mu.Lock()
	f.bad++
	f.mu.Unlock()
}

// arrived notes when frame i arrived.
func (f *liveFeed) arrived(i int, t time.Time) {
	f.mu.Lock()
	f.arrivedIdx[i%arrivalRing], f.arrivedAt[i%arrivalRing] = i, t
	f.mu.Unlock()
}

// watched notes that the engine has updated on frame i.
func (f *liveFeed) watched(i int) {
	now := time.Now()
	f.mu.Lock()
	defer f.mu.Unlock()
	f.monitored++
	if f.arrivedIdx[i%arrivalRing] == i {
		ms := float64(now.Sub(f.arrivedAt[i%arrivalRing])) / float64(time.Millisecond)
		if len(f.lat) < latencySamples {
			f.lat = append(f.lat, ms)
		} else {
			f.lat[f.latNext] = ms
			f.latNext = (f.latNext + 1) % latencySamples
		}
	}
	f.sampleLocked(now)
}

// totalsLocked returns frames in, dropped, bad and reconnects so far.
func (f *liveFeed) totalsLocked() live.Counts {
	c := f.prev
	c.Received += f.in
	c.Dropped += f.dropped
	c.Bad += f.bad
	if f.counts != nil {
		n := f.counts()
		c.Received += n.Received
		c.Dropped += n.Dropped
		c.Bad += n.Bad
		c.Reconnects += n.Reconnects
	}
	return c
}

// sampleLocked keeps a few seconds of (time, frames in, frames monitored)
// points, at most four a second, for the rates.
func (f *liveFeed) sampleLocked(now time.Time) {
	if n := len(f.samples); n > 0 && now.Sub(f.samples[n-1].t) < rateWindow/20 {
		return
	}
	c := f.totalsLocked()
	f.samples = append(f.samples, rateSample{now, c.Received, f.monitored})
	cut := 0
	for cut < len(f.samples)-2 && now.Sub(f.samples[cut].t) > rateWindow {
		cut++
	}
	f.samples = f.samples[cut:]
}

func (f *liveFeed) status() LiveStatus {
	now := time.Now()
	f.mu.Lock()
	defer f.mu.Unlock()
	f.sampleLocked(now)
	c := f.totalsLocked()
	st := LiveStatus{
		Kind: f.cfg.Kind, FramesIn: c.Received, FramesMonitored: f.monitored, Dropped: c.Dropped,
		Bad: c.Bad, Reconnects: c.Reconnects, Reconnecting: f.reconnecting,
		ARL0: f.arl0, PerHours: f.cfg.PerHours, FPS: f.cfg.FPS,
	}
	if len(f.samples) >= 2 {
		a := f.samples[0]
		if dt := now.Sub(a.t).Seconds(); dt > 0.2 {
			st.FPSIn = float64(c.Received-a.in) / dt
			st.FPSMonitored = float64(f.monitored-a.monitored) / dt
		}
	}
	if len(f.lat) > 0 {
		l := slices.Clone(f.lat)
		slices.Sort(l)
		st.LatencyMedian = quantile(l, 0.5)
		st.LatencyP95 = quantile(l, 0.95)
	}
	if f.cfg.PerHours > 0 && math.Round(f.cfg.PerHours*3600*f.cfg.FPS) == f.arl0 { // not after a PATCH of arl0
		st.ARL0Rule = fmt.Sprintf("at most one false alarm per %g h at %g frames/s: %g h x 3600 s x %g frames/s = %.0f frames",
			f.cfg.PerHours, f.cfg.FPS, f.cfg.PerHours, f.cfg.FPS, f.arl0)
	} else {
		st.PerHours, st.FPS = 0, 0
		st.ARL0Rule = fmt.Sprintf("arl0 given in frames: %.0f", f.arl0)
	}
	return st
}

// quantile of sorted values, linear between neighbours.
func quantile(s []float64, q float64) float64 {
	x := q * float64(len(s)-1)
	i := int(x)
	if i+1 >= len(s) {
		return s[len(s)-1]
	}
	return s[i] + (x-float64(i))*(s[i+1]-s[i])
}

// liveSource is a frames.Source over a live feed: it waits for the next
// frame (or ctx), decodes encoded frames with frames.Decode, and numbers
// frames from base so a resumed session does not reuse frame numbers.
type liveSource struct {
	ctx       context.Context
	feed      *liveFeed
	next      func() (pushed, bool) // blocks; false when the source ended
	end       func() error          // why the source ended (nil = clean end)
	maxPixels int64
	base, n   int
	fr        frames.Frame
}

func (ls *liveSource) Len() int     { return -1 }
func (ls *liveSource) Close() error { return nil }

func (ls *liveSource) Next() (frames.Item, error) {
	if err := ls.ctx.Err(); err != nil {
		return frames.Item{}, err
	}
	p, ok := ls.next()
	if !ok {
		if err := ls.ctx.Err(); err != nil {
			return frames.Item{}, err
		}
		if err := ls.end(); err != nil && !errors.Is(err, context.Canceled) {
			return frames.Item{}, err
		}
		return frames.Item{}, io.EOF
	}
	i := ls.base + ls.n
	ls.n++
	if p.arrived.IsZero() {
		p.arrived = time.Now()
	}
	ls.feed.arrived(i, p.arrived)
	it := frames.Item{Index: i, Name: p.name, Bytes: int64(len(p.data))}
	if p.err != nil {
		ls.feed.badFrame()
		it.Err = &frames.FileError{Name: p.name, Err: p.err}
		return it, nil
	}
	if p.frame != nil {
		it.Frame, it.Pixels = p.frame, p.frame
		ls.feed.keepShot(i, p.frame)
		return it, nil
	}
	if _, err := frames.Decode(p.data, ls.maxPixels, &ls.fr); err != nil {
		ls.feed.badFrame()
		it.Err = &frames.FileError{Name: p.name, Err: err}
		return it, nil
	}
	it.Frame, it.Pixels = &ls.fr, &ls.fr
	ls.feed.keepShot(i, &ls.fr)
	return it, nil
}

// fromLive adapts a frames/live channel.
func fromLive(ctx context.Context, ch <-chan live.Frame) func() (pushed, bool) {
	return func() (pushed, bool) {
		select {
		case <-ctx.Done():
			return pushed{}, false
		case f, ok := <-ch:
			return pushed{name: f.Name, data: f.Data, arrived: f.Arrived}, ok
		}
	}
}

// liveParams decodes a live session's params: the usual ones, where
// "per_hours" with "fps" may set the target as "at most one false alarm
// per per_hours hours" at fps frames a second instead of "arl0" in frames.
// Live sessions run at the frames' own pace.
func liveParams(raw json.RawMessage) (Params, liveConfig, error) {
	base := DefaultParams()
	base.Pace = 0
	return paramsOnto(base, raw)
}

// paramsOnto decodes a partial params object onto base, as decodeParams,
// and also takes "per_hours" with "fps" in place of "arl0"; the returned
// liveConfig carries them (zero when the target was not given that way).
func paramsOnto(base Params, raw json.RawMessage) (Params, liveConfig, error) {
	var cfg liveConfig
	var set map[string]json.RawMessage
	if len(bytes.TrimSpace(raw)) > 0 {
		if err := json.Unmarshal(raw, &set); err != nil {
			return base, cfg, errorf(KindInvalid, "params: %v", err)
		}
	}
	num := func(k string) (float64, bool, error) {
		v, ok := set[k]
		if !ok {
			return 0, false, nil
		}
		delete(set, k)
		var f float64
		if err := json.Unmarshal(v, &f); err != nil || !(f > 0) || math.IsInf(f, 0) {
			return 0, true, errorf(KindInvalid, "params: %s must be a positive number", k)
		}
		return f, true, nil
	}
	ph, havePH, err := num("per_hours")
	if err != nil {
		return base, cfg, err
	}
	fps, haveFPS, err := num("fps")
	if err != nil {
		return base, cfg, err
	}
	_, haveARL0 := set["arl0"]
	switch {
	case havePH && !haveFPS:
		return base, cfg, errorf(KindInvalid, "params: per_hours needs fps (the frame rate that turns hours into frames)")
	case haveFPS && !havePH:
		return base, cfg, errorf(KindInvalid, "params: fps is only used with per_hours")
	case havePH && haveARL0:
		return base, cfg, errorf(KindInvalid, "params: give either arl0 (frames) or per_hours with fps, not both")
	case haveFPS && fps > maxLiveFPS:
		return base, cfg, errorf(KindInvalid, "params: fps %g must be at most %d", fps, maxLiveFPS)
	}
	rest, _ := json.Marshal(set)
	if len(set) == 0 {
		rest = nil
	}
	p, err := decodeParams(base, rest)
	if err != nil {
		return p, cfg, err
	}
	if havePH {
		cfg.PerHours, cfg.FPS = ph, fps
		p.ARL0 = math.Round(ph * 3600 * fps)
		if err := validateParams(p); err != nil {
			return p, cfg, errorf(KindInvalid, "params: per_hours %g at fps %g gives arl0 %g frames: %s", ph, fps, p.ARL0, trimPrefix(err.(*Error).Msg))
		}
	}
	return p, cfg, nil
}

// patchParams decodes a PATCH (or calibrate) body onto the session's
// current params. Any session may give the false-alarm target as
// "per_hours" with "fps"; a live session also keeps that rule in live.json,
// so its status goes on stating it.
func (sess *Session) patchParams(cur Params, body []byte) (Params, error) {
	p, cfg, err := paramsOnto(cur, body)
	if err != nil || cfg.PerHours == 0 {
		return p, err
	}
	sess.mu.Lock()
	kind, dir := sess.meta.Source.Kind, sess.dir
	sess.mu.Unlock()
	if !isLiveKind(kind) {
		return p, nil
	}
	feed, err := sess.feedOf()
	if err != nil {
		return p, err
	}
	feed.mu.Lock()
	feed.cfg.PerHours, feed.cfg.FPS = cfg.PerHours, cfg.FPS
	saved := feed.cfg
	feed.mu.Unlock()
	data, _ := json.MarshalIndent(saved, "", "  ")
	if err := writeFileSync(filepath.Join(dir, liveFile), append(data, '\n')); err != nil {
		return p, fmt.Errorf("server: save %s: %w", liveFile, err)
	}
	return p, nil
}

// cameraAllow builds the operator's allow-list.
func (s *Server) cameraAllow() (*live.AllowList, error) {
	a, err := live.NewAllowList(s.opt.AllowCameraURL...)
	if err != nil {
		return nil, errorf(KindUnavailable, "the server's camera URL list is not valid: %v", err)
	}
	return a, nil
}

// createLive makes a live session of the given kind; nothing is fetched or
// read before the source is checked (allow-list, watched-folder root).
func (s *Server) createLive(kind, url, path, name string, raw json.RawMessage) (*Session, error) {
	p, cfg, err := liveParams(raw)
	if err != nil {
		return nil, err
	}
	cfg.Kind, cfg.URL, cfg.Path = kind, url, path
	switch kind {
	case kindCameraURL:
		allow, err := s.cameraAllow()
		if err != nil {
			return nil, err
		}
		if err := allow.Check(url); err != nil {
			var ref *live.RefusedError
			if errors.As(err, &ref) {
				return nil, errorf(KindForbidden, "camera URL %q refused: %s; nothing was fetched", ref.URL, ref.Reason)
			}
			return nil, errorf(KindForbidden, "camera URL refused: %v", err)
		}
	case kindFolder:
		if _, err := s.openFolder(cfg, false, nil); err != nil {
			return nil, err
		}
	case kindBrowserCamera:
	case kindStdin:
		return nil, errorf(KindInvalid, "a standard-input session is made by the server operator (serve --stdin-frames)")
	}
	if name == "" {
		name = "live: " + kind
	}
	return s.newLiveSession(name, cfg, p, nil)
}

// newLiveSession writes live.json and starts the session; pipe, if set, is
// the standard-input feed this session owns.
func (s *Server) newLiveSession(name string, cfg liveConfig, p Params, pipe *liveFeed) (*Session, error) {
	id, dir, err := s.newSessionDir()
	if err != nil {
		return nil, err
	}
	if pipe != nil {
		s.mu.Lock()
		s.stdinID, s.stdinFeed = id, pipe
		s.mu.Unlock()
	}
	data, _ := json.MarshalIndent(cfg, "", "  ")
	if err := writeFileSync(filepath.Join(dir, liveFile), append(data, '\n')); err != nil {
		os.RemoveAll(dir)
		return nil, err
	}
	return s.createSession(id, dir, name, Source{Kind: cfg.Kind}, p)
}

// openFolder checks (and opens) a watched folder inside the operator's root.
func (s *Server) openFolder(cfg liveConfig, skipExisting bool, events func(live.Event)) (*live.Folder, error) {
	if s.opt.WatchRoot == "" {
		return nil, errorf(KindForbidden, "the server watches no folders (start it with --watch-root DIR)")
	}
	if cfg.Path == "" {
		return nil, errorf(KindInvalid, "source.path missing: the folder to watch, inside the watched-folder root")
	}
	f, err := live.NewFolder(live.FolderConfig{
		Root: s.opt.WatchRoot, Dir: cfg.Path, SkipExisting: skipExisting,
		Interval: 200 * time.Millisecond, Logger: s.log, Events: events,
	})
	var out *live.OutsideRootError
	switch {
	case errors.As(err, &out):
		return nil, errorf(KindForbidden, "folder %q is outside the watched-folder root; nothing was read", cfg.Path)
	case err != nil:
		return nil, errorf(KindInvalid, "folder %q: %s", cfg.Path, trimPrefix(err.Error()))
	}
	return f, nil
}

// feedOf returns the session's live feed, made from live.json on first need
// (a session resumed after a restart).
func (sess *Session) feedOf() (*liveFeed, error) {
	// The server's lock is taken before (never inside) the session's, as
	// everywhere else.
	sess.srv.mu.RLock()
	stdinID, stdinFeed := sess.srv.stdinID, sess.srv.stdinFeed
	sess.srv.mu.RUnlock()
	sess.mu.Lock()
	defer sess.mu.Unlock()
	if sess.feed != nil {
		return sess.feed, nil
	}
	data, err := os.ReadFile(filepath.Join(sess.dir, liveFile))
	if err != nil {
		return nil, fmt.Errorf("server: %s: %w", liveFile, err)
	}
	var cfg liveConfig
	if err := json.Unmarshal(data, &cfg); err != nil {
		return nil, fmt.Errorf("server: %s: %w", liveFile, err)
	}
	sess.feed = newLiveFeed(cfg)
	if cfg.Kind == kindStdin {
		// Only the session made by this process reads its standard input;
		// one left by an earlier process has no feed (q stays nil).
		sess.feed.q = nil
		if stdinID == sess.meta.ID {
			sess.feed = stdinFeed
		}
	}
	sess.feed.mu.Lock()
	sess.feed.arl0 = sess.meta.Params.ARL0 // liveReview sets it again for each run
	sess.feed.mu.Unlock()
	return sess.feed, nil
}

// liveReview runs a live session: it opens the source, then learns the
// reference, calibrates and watches with the shared review loop until the
// source ends or the session is stopped.
func liveReview(ctx context.Context, s *Session) (*Report, error) {
	m := s.metaCopy()
	feed, err := s.feedOf()
	if err != nil {
		return nil, err
	}
	rp := reviewParams(m.Params)
	feed.mu.Lock()
	feed.arl0 = rp.ARL0
	cfg := feed.cfg // a PATCH may change its target fields meanwhile
	feed.mu.Unlock()
	rctx, cancel := context.WithCancel(ctx)
	defer cancel()
	resumed := s.resumeAfter >= 0
	ls := &liveSource{ctx: rctx, feed: feed, maxPixels: int64(s.srv.opt.MaxPixels), base: s.resumeAfter + 1,
		end: func() error { return nil }}
	var wait sync.WaitGroup
	defer wait.Wait()
	defer cancel()
	// Parts and files the source skipped (corrupt, cut short, too large)
	// are listed with the session's frame errors.
	events := func(e live.Event) {
		feed.event(e)
		if e.Kind == live.EventBadFrame && e.Err != nil {
			s.frameError("", -1, e.Err)
		}
	}
	switch cfg.Kind {
	case kindCameraURL:
		allow, err := s.srv.cameraAllow()
		if err != nil {
			return nil, err
		}
		cam, err := live.NewCamera(live.CameraConfig{URL: cfg.URL, Allow: allow, Events: events, Logger: s.log,
			MinBackoff: 100 * time.Millisecond, MaxBackoff: 5 * time.Second})
		if err != nil {
			return nil, errorf(KindForbidden, "%s", trimPrefix(err.Error()))
		}
		feed.setSource(cam.Counts)
		var runErr error
		wait.Add(1)
		go func() { defer wait.Done(); runErr = cam.Run(rctx) }()
		ls.next = fromLive(rctx, cam.Frames())
		ls.end = func() error { wait.Wait(); return runErr }
	case kindFolder:
		f, err := s.srv.openFolder(cfg, resumed, events)
		if err != nil {
			return nil, err
		}
		feed.setSource(f.Counts)
		var runErr error
		wait.Add(1)
		go func() { defer wait.Done(); runErr = f.Run(rctx) }()
		ls.next = fromLive(rctx, f.Frames())
		ls.end = func() error { wait.Wait(); return runErr }
	case kindBrowserCamera, kindStdin:
		if feed.q == nil {
			return nil, errorf(KindInvalid, "the standard input this session read belonged to an earlier server process")
		}
		ls.next = func() (pushed, bool) {
			select {
			case <-rctx.Done():
				return pushed{}, false
			case p, ok := <-feed.q:
				if ok {
					feed.mu.Lock()
					feed.taken++
					feed.mu.Unlock()
					if cfg.Kind == kindBrowserCamera {
						s.ackCamera(feed)
					}
				}
				return p, ok
			}
		}
		ls.end = feed.pipeEnd
	default:
		return nil, errorf(KindInvalid, "live source kind %q unknown", cfg.Kind)
	}
	cached, haveCached := loadCalibration(s.dir, rp)
	if haveCached && rp.Limit <= 0 {
		rp.Limit = cached.Limit
	}
	s.setState(StateLearning, "")
	h := s.hooks(rctx, cancel, rp)
	frame := h.Frame
	h.Frame = func(ev review.FrameEvent) {
		frame(ev)
		feed.watched(ev.Index)
	}
	rep, err := review.Run(rctx, ls, rp, h)
	if s.hookErr != nil && ctx.Err() == nil {
		return nil, s.hookErr
	}
	if err != nil {
		if ctx.Err() != nil {
			return nil, ctx.Err()
		}
		return nil, errorf(KindInvalid, "%s", trimPrefix(err.Error()))
	}
	if haveCached && m.Params.Limit <= 0 && rep.Calibration == nil {
		rep.Calibration = cached.Report
	}
	return &rep, nil
}

// ingest feeds one encoded frame (JPEG or PNG) from the owner's websocket
// to a browser-camera session; other sessions ignore it.
func (sess *Session) ingest(ctx context.Context, data []byte) {
	sess.mu.Lock()
	kind := sess.meta.Source.Kind
	sess.mu.Unlock()
	if kind != kindBrowserCamera {
		return
	}
	feed, err := sess.feedOf()
	if err != nil {
		return
	}
	feed.mu.Lock()
	name := fmt.Sprintf("camera#%d", feed.in)
	feed.mu.Unlock()
	n, _ := feed.push(ctx, pushed{name: name, data: slices.Clone(data), arrived: time.Now()})
	for range n {
		sess.ackCamera(feed)
	}
}

// cameraAck is the text message an owner's page gets each time one of the
// camera frames it sent leaves the server's queue, taken by the review or
// dropped; a page keeps only a couple of frames unanswered (in flight).
type cameraAck struct {
	Type    string `json:"type"` // "camera"
	In      uint64 `json:"in"`   // frames received so far (this session)
	Taken   uint64 `json:"taken"`
	Dropped uint64 `json:"dropped"`
}

// ackCamera sends a cameraAck to the session's owner connections only.
func (sess *Session) ackCamera(feed *liveFeed) {
	feed.mu.Lock()
	a := cameraAck{Type: "camera", In: feed.in, Taken: feed.taken, Dropped: feed.dropped}
	feed.mu.Unlock()
	msg, err := json.Marshal(a)
	if err != nil {
		return
	}
	h := sess.hub
	h.mu.RLock()
	for v := range h.viewers {
		if v.role == roleOwner {
			v.putEvent(msg)
		}
	}
	h.mu.RUnlock()
}

// pipeEnd is why a pipe ended: nil at a clean end of input.
func (f *liveFeed) pipeEnd() error {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.endErr
}

// CreateStdinSession makes a live session that reads concatenated PNG and
// JPEG images from r (the server's standard input) until it ends; params
// are as for POST /api/sessions (per_hours with fps allowed). It returns
// the owner URL.
func (s *Server) CreateStdinSession(r io.Reader, name string, params json.RawMessage) (string, error) {
	p, cfg, err := liveParams(params)
	if err != nil {
		return "", err
	}
	cfg.Kind = kindStdin
	feed := newLiveFeed(cfg)
	if name == "" {
		name = "live: standard input"
	}
	sess, err := s.newLiveSession(name, cfg, p, feed)
	if err != nil {
		return "", err
	}
	go s.pumpStream(frames.NewImageStream(r, "stdin", frames.Options{MaxPixels: int64(s.opt.MaxPixels)}), feed)
	m := sess.metaCopy()
	return s.ownerURL(m.ID, m.OwnerToken), nil
}

// pumpStream moves a stream's frames (copies: the stream reuses its
// buffer) into feed's queue, waiting when the review is behind, and closes
// the queue at the end of the stream or when the server stops.
func (s *Server) pumpStream(src frames.Source, feed *liveFeed) {
	defer close(feed.q)
	for {
		it, err := src.Next()
		if err != nil {
			if !errors.Is(err, io.EOF) {
				feed.mu.Lock()
				feed.endErr = err
				feed.mu.Unlock()
			}
			return
		}
		p := pushed{name: it.Name, err: it.Err, arrived: time.Now()}
		if it.Err == nil && it.Frame != nil {
			fr := *it.Frame
			fr.Pix = slices.Clone(it.Frame.Pix)
			p.frame = &fr
		} else if it.Err == nil {
			p.err = errors.New("frame has no pixels")
		}
		if _, err := feed.push(s.ctx, p); err != nil {
			return
		}
	}
}
