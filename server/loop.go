package server

import (
	"context"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"time"

	"sparsewatch/frames"
	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

// reviewSink receives what a review does; *Session implements it.
type reviewSink interface {
	setState(state, message string)
	setGeometry(w, h, tile, budget, total int)
	setReference(done, total int)
	setCalibration(c Calibration)
	frameError(file string, frame int, err error)
	onFrame(ctx context.Context, fu frameUpdate) error
	onAlarm(a reportAlarm) error
}

// openSource opens a session's frames: the uploaded folder or .zip, or a
// demo scenario rendered frame by frame.
func (srv *Server) openSource(dir string, src Source) (frames.Source, []string, error) {
	opts := frames.Options{MaxPixels: int64(srv.opt.MaxPixels), MaxFileBytes: srv.maxFileBytes()}
	switch src.Kind {
	case "demo":
		s, err := openDemo(src.Scenario, opts)
		return s, nil, err
	case "upload":
		fdir := filepath.Join(dir, framesDirName)
		var (
			fs  frames.Source
			lst *frames.Listing
			err error
		)
		if uploadKind(src.Files) == uploadKindZip {
			fs, lst, err = frames.OpenZipFile(filepath.Join(fdir, src.Files[0]), opts)
		} else {
			fs, lst, err = frames.OpenFolder(fdir, opts)
		}
		if err != nil {
			return nil, nil, errorf(KindInvalid, "%v", err)
		}
		return fs, lst.Skipped, nil
	}
	return nil, nil, errorf(KindInvalid, "source kind %q unknown", src.Kind)
}

// frameNames lists an upload's frame files in the review's order (without
// decoding them); index i is frame i.
func (srv *Server) frameNames(dir string, src Source) ([]string, error) {
	fdir := filepath.Join(dir, framesDirName)
	opts := frames.Options{MaxPixels: int64(srv.opt.MaxPixels), MaxFileBytes: srv.maxFileBytes()}
	var (
		fs  frames.Source
		lst *frames.Listing
		err error
	)
	if uploadKind(src.Files) == uploadKindZip {
		fs, lst, err = frames.OpenZipFile(filepath.Join(fdir, src.Files[0]), opts)
	} else {
		fs, lst, err = frames.OpenFolder(fdir, opts)
	}
	if err != nil {
		return nil, err
	}
	fs.Close()
	return lst.Frames, nil
}

func (srv *Server) maxFileBytes() int64 {
	return min(srv.opt.MaxUploadBytes, int64(srv.opt.MaxPixels)*16+1<<20)
}

// reviewParams turns session params into the review's.
func reviewParams(p Params) review.Params {
	return review.Params{
		Budget: string(p.Budget), Policy: p.Policy, TopR: p.TopR, Shift: p.Shift,
		Compensation: p.Compensation, Tile: p.Tile, ARL0: p.ARL0,
		ReferenceFrames: p.ReferenceFrames, Model: p.Model, Seed: p.Seed,
		Calibration: p.Calibration, Paths: p.Paths, Limit: p.Limit,
	}
}

// defaultReview reviews a session's frames with the shared review loop
// (the scan command's), reporting every step to the session.
func defaultReview(ctx context.Context, s *Session) (*Report, error) {
	m := s.metaCopy()
	src, skipped, err := s.srv.openSource(s.dir, m.Source)
	if err != nil {
		return nil, err
	}
	src = frames.Prefetch(src, 2) // decode ahead on the second core, as scan does
	defer src.Close()
	s.setTotal(src.Len())
	rp := reviewParams(m.Params)
	cached, haveCached := loadCalibration(s.dir, rp)
	if haveCached && rp.Limit <= 0 {
		rp.Limit = cached.Limit // same limit as before a restart, without recalibrating
	}
	s.setState(StateLearning, "")
	rctx, cancel := context.WithCancel(ctx)
	defer cancel()
	rep, err := review.Run(rctx, src, rp, s.hooks(rctx, cancel, rp))
	if s.hookErr != nil && ctx.Err() == nil {
		return nil, s.hookErr // a log could not be written: stop, say why
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
	rep.Skipped = skipped
	rep.Seconds = 0 // not comparable across a resume; the status has the speed
	return &rep, nil
}

func trimPrefix(s string) string {
	for _, p := range []string{"review: ", "frames: ", "monitor: "} {
		if len(s) > len(p) && s[:len(p)] == p {
			s = s[len(p):]
		}
	}
	return s
}

// hooks connects review.Run to the session. s.hookErr keeps the first
// persistence error, which stops the review at the next frame.
func (s *Session) hooks(ctx context.Context, cancel context.CancelFunc, rp review.Params) review.Hooks {
	started := false
	return review.Hooks{
		Reference: func(done, total int) { s.setReference(done, total) },
		Calibrating: func(_ int, _ string, done, total int) {
			if !started {
				started = true
				s.setState(StateCalibrating, "")
			}
			if total > 0 && done%max(total/20, 1) == 0 {
				s.setCalibration(Calibration{Progress: float64(done) / float64(total)})
			}
		},
		Calibrated: func(_ int, _ string, cal monitor.Calibration) {
			saveCalibration(s.dir, rp, cal)
			s.setCalibration(Calibration{Progress: 1, Limit: cal.Limit, ARL0: cal.ARL0, ARL0SE: cal.ARL0SE,
				Model: cal.Model, Extrapolated: cal.Extrapolated, Note: cal.Note})
		},
		Frame: func(ev review.FrameEvent) {
			if s.hookErr != nil {
				return
			}
			if ev.Update == nil {
				return
			}
			if s.run.enc == nil {
				t := ev.Tiler
				s.setGeometry(t.W, t.H, t.K, len(ev.Update.Read), ev.Total)
				s.setState(StateWatching, "")
			}
			u := ev.Update
			var boxes []box
			for _, r := range u.Regions {
				b := ev.Tiler.PixelBox(r.X0, r.Y0, r.X1, r.Y1)
				boxes = append(boxes, box{b[0], b[1], b[2], b[3], r.Peak})
			}
			if s.hub.heat.Load() > 0 && ev.Local != nil && time.Since(s.heatAt) >= heatEvery {
				// Heat images for the viewers that asked: at most a few a
				// second, since reading every stream's statistic is O(m).
				s.heatAt = time.Now()
				s.heatBuf = ev.Local(s.heatBuf)
				t := ev.Tiler
				s.hub.publish(msgHeat, encodeHeat(ev.Index, s.heatBuf, t.GW, t.GH, u.Limit))
			}
			s.hookErr = s.onFrame(ctx, frameUpdate{
				Frame: ev.Index, Name: ev.Name, G: u.G, Limit: u.Limit, Alarm: u.State == monitor.Alarming,
				Read: u.Read, Regions: boxes, PixelsRead: ev.PixelsRead,
			})
			if s.hookErr != nil {
				cancel()
			}
		},
		Alarm: func(_ int, _ string, a review.Alarm) {
			if s.hookErr == nil {
				if s.hookErr = s.onAlarm(a); s.hookErr != nil {
					cancel()
				}
			}
		},
		Error: func(fe review.FileError) {
			s.frameError(fe.File, fe.Frame, errors.New(fe.Reason))
		},
	}
}

// cachedCalibration is calibration.json in a session folder: the limit
// found for one set of parameters, reused when the review resumes.
type cachedCalibration struct {
	Key    string              `json:"key"`
	Limit  float64             `json:"limit"`
	Report *review.Calibration `json:"report"`
}

const calibrationFile = "calibration.json"

func calibrationKey(rp review.Params) string {
	rp.Limit = 0
	b, _ := json.Marshal(rp)
	return string(b)
}

func loadCalibration(dir string, rp review.Params) (cachedCalibration, bool) {
	var c cachedCalibration
	data, err := os.ReadFile(filepath.Join(dir, calibrationFile))
	if err != nil || json.Unmarshal(data, &c) != nil || c.Key != calibrationKey(rp) || !(c.Limit > 0) {
		return c, false
	}
	return c, true
}

func saveCalibration(dir string, rp review.Params, cal monitor.Calibration) {
	fin := func(v float64) float64 {
		if v != v || v > 1e300 || v < -1e300 {
			return -1
		}
		return v
	}
	c := cachedCalibration{Key: calibrationKey(rp), Limit: cal.Limit, Report: &review.Calibration{
		TargetARL0: rp.ARL0, ARL0: fin(cal.ARL0), ARL0SE: fin(cal.ARL0SE), VerifiedARL0: fin(cal.VerifiedARL0),
		VerifiedSE: fin(cal.VerifiedSE), Model: cal.Model, Extrapolated: cal.Extrapolated, Paths: cal.Paths, Note: cal.Note,
	}}
	if data, err := json.Marshal(c); err == nil {
		writeFileSync(filepath.Join(dir, calibrationFile), data)
	}
}

// heatEvery is the shortest gap between two heat images of a session.
const heatEvery = 250 * time.Millisecond
