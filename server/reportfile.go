package server

import (
	"archive/zip"
	"bytes"
	"fmt"
	"image"
	"net/http"
	"path/filepath"
	"time"

	"github.com/labstack/echo/v4"

	"sparsewatch/frames"
	"sparsewatch/monitor"
	"sparsewatch/server/htmlreport"
)

// maxReportSnapshots bounds the pictures one report carries (each is a
// PNG of up to 480 px wide); later alarms are listed without one.
const maxReportSnapshots = 60

// maxReportPoints thins the statistic chart of a long session.
const maxReportPoints = 4000

// handleReportHTML answers the session's review as one self-contained
// HTML file (htmlreport): parameters, chart, a picture per alarm, the
// alarm table and the planner's table when one was run.
func (s *Server) handleReportHTML(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	if err := s.writeReportHTML(&buf, sess); err != nil {
		return err
	}
	c.Response().Header().Set("Content-Disposition", fmt.Sprintf(`attachment; filename="sparsewatch-%s.html"`, sess.metaCopy().ID))
	c.Response().Header().Set("Cache-Control", "no-store")
	return c.Blob(http.StatusOK, "text/html; charset=utf-8", buf.Bytes())
}

func (s *Server) writeReportHTML(buf *bytes.Buffer, sess *Session) error {
	m := sess.metaCopy()
	rep := sess.Report()
	rows, err := readStats(sess.dir)
	if err != nil {
		return err
	}
	step := max(1, (len(rows)+maxReportPoints-1)/maxReportPoints)
	var series []htmlreport.Point
	for i, r := range rows {
		if i%step == 0 || i == len(rows)-1 {
			series = append(series, htmlreport.Point{Frame: r.Frame, G: r.G, Limit: r.Limit})
		}
	}
	snaps := map[int]image.Image{}
	for i, a := range rep.Alarms {
		if i >= maxReportSnapshots {
			break
		}
		img, err := s.frameImage(sess, a.Frame)
		if err != nil {
			sess.log.Debug("no report snapshot", "frame", a.Frame, "err", err)
			continue
		}
		snaps[a.Frame] = img
	}
	in := htmlreport.Input{Title: "sparsewatch review: " + m.Name, Report: rep, Series: series, Snapshots: snaps,
		Generated: time.Now()}
	if rec, ok := loadPlan(sess.dir); ok && rec.State == "done" {
		for _, r := range rec.Results {
			pol, _ := monitor.ParsePolicy(r.Policy)
			in.Plan = append(in.Plan, htmlreport.PlanRow{PlanResult: monitor.PlanResult{Policy: pol, Budget: r.Budget, Streams: r.Streams, Limit: r.Limit,
				ARL0: r.ARL0, ARL0SE: r.ARL0SE, ADD: r.ADD, ADDSE: r.ADDSE, FalseAlarms: r.FalseAlarms, Missed: r.Missed, Note: r.Note},
				NormalLimit: r.NormalLimit, NormalARL0: r.NormalARL0, NormalARL0SE: r.NormalARL0SE})
		}
		in.PlanNote = fmt.Sprintf("%d x %d streams, change of radius %.3g streams (%d streams) shifted by %g, target ARL0 %g. %s.",
			rec.GridW, rec.GridH, rec.Radius, rec.Changed, rec.Request.Shift, rec.Request.ARL0, rec.Note)
		if rec.Advice != nil {
			in.PlanNote += " " + rec.Advice.Text
		}
		in.ModelNote = rec.ModelNote
	}
	return htmlreport.Write(buf, in)
}

// frameImage decodes frame index f of the session as a grey picture
// (htmlreport.Gray stretches it to 8 bits).
func (s *Server) frameImage(sess *Session, f int) (image.Image, error) {
	m := sess.metaCopy()
	if m.Source.Kind == "demo" {
		sc, err := lookupDemo(m.Source.Scenario)
		if err != nil {
			return nil, err
		}
		img, err := sc.Frame(f)
		if err != nil {
			return nil, err
		}
		var fr frames.Frame
		frames.FromImage(img, &fr)
		return htmlreport.Gray(fr), nil
	}
	name, ok := sess.frameName(f)
	if !ok {
		return nil, fmt.Errorf("server: frame %d is not in the session's listing", f)
	}
	opts := frames.Options{MaxPixels: int64(s.opt.MaxPixels), MaxFileBytes: s.maxFileBytes()}
	var fr frames.Frame
	if uploadKind(m.Source.Files) == uploadKindZip {
		zr, err := zip.OpenReader(filepath.Join(sess.dir, framesDirName, m.Source.Files[0]))
		if err != nil {
			return nil, err
		}
		defer zr.Close()
		for _, zf := range zr.File {
			if zf.Name == name {
				data, err := readEntry(entry{Name: zf.Name, open: zf.Open}, opts.MaxFileBytes)
				if err != nil {
					return nil, err
				}
				if _, err := frames.Decode(data, opts.MaxPixels, &fr); err != nil {
					return nil, err
				}
				return htmlreport.Gray(fr), nil
			}
		}
		return nil, fmt.Errorf("server: %q is not in the archive", name)
	}
	if filepath.Base(name) != name {
		return nil, fmt.Errorf("server: bad frame name %q", name)
	}
	src, err := frames.OpenFile(filepath.Join(sess.dir, framesDirName, name), opts)
	if err != nil {
		return nil, err
	}
	defer src.Close()
	it, err := src.Next()
	if err != nil {
		return nil, err
	}
	if it.Err != nil {
		return nil, it.Err
	}
	f2, _, err := frames.Full(it, &fr)
	if err != nil {
		return nil, err
	}
	return htmlreport.Gray(*f2), nil
}
