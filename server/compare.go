package server

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"strings"
	"time"

	"github.com/labstack/echo/v4"

	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

const (
	maxComparePolicies = 6
	maxComparePoints   = 2000 // chart points per compared run
	compareTimeout     = 30 * time.Minute
)

// compareRun is one policy's result in a compare answer.
type compareRun struct {
	Policy string    `json:"policy"`
	Report Report    `json:"report"`
	Frame  []int32   `json:"frame"`
	G      []float32 `json:"g"`
}

// handleCompare reviews the session's frames again, as fast as possible,
// once for its own policy and once for each asked one, on the same frames
// and parameters (review.RunPolicies), and answers every run's report and
// statistic series. One compare runs at a time on a server.
func (s *Server) handleCompare(c echo.Context) error {
	sess, _, err := s.authorize(c, true)
	if err != nil {
		return err
	}
	body, err := io.ReadAll(http.MaxBytesReader(c.Response(), c.Request().Body, maxJSONBody))
	if err != nil {
		return err
	}
	var req struct {
		Policies []string `json:"policies"`
	}
	if err := json.Unmarshal(body, &req); err != nil {
		return errorf(KindInvalid, "compare: want {\"policies\":[...]}: %v", err)
	}
	m := sess.metaCopy()
	pols := []string{m.Params.Policy}
	for _, p := range req.Policies {
		p = strings.TrimSpace(p)
		if pol, err := monitor.ParsePolicy(p); err != nil || pol == monitor.Oracle {
			return errorf(KindInvalid, "compare: policy %q unknown", p)
		}
		dup := false
		for _, q := range pols {
			dup = dup || q == p
		}
		if !dup {
			pols = append(pols, p)
		}
	}
	if len(pols) > maxComparePolicies {
		return errorf(KindInvalid, "compare: at most %d policies at once", maxComparePolicies)
	}
	select {
	case s.compareSlot <- struct{}{}:
		defer func() { <-s.compareSlot }()
	default:
		return errorf(KindUnavailable, "another compare is running; try again when it is done")
	}
	http.NewResponseController(c.Response().Writer).SetWriteDeadline(time.Now().Add(compareTimeout))
	ctx, cancel := context.WithTimeout(c.Request().Context(), compareTimeout)
	defer cancel()
	go func() { // end with the server, too
		select {
		case <-s.ctx.Done():
			cancel()
		case <-ctx.Done():
		}
	}()
	src, skipped, err := s.openSource(sess.dir, m.Source)
	if err != nil {
		return err
	}
	defer src.Close()
	runs := make([]compareRun, len(pols))
	step := make([]int, len(pols))
	for i := range runs {
		runs[i].Policy, step[i] = pols[i], 1
	}
	hooks := review.Hooks{Frame: func(ev review.FrameEvent) {
		r := &runs[ev.Run]
		if ev.Index%step[ev.Run] != 0 {
			return
		}
		r.Frame = append(r.Frame, int32(ev.Index))
		r.G = append(r.G, float32(ev.Update.G))
		if len(r.Frame) >= maxComparePoints { // thin 2:1
			step[ev.Run] *= 2
			j := 0
			for k := 0; k < len(r.Frame); k += 2 {
				r.Frame[j], r.G[j] = r.Frame[k], r.G[k]
				j++
			}
			r.Frame, r.G = r.Frame[:j], r.G[:j]
		}
	}}
	reps, err := review.RunPolicies(ctx, src, reviewParams(m.Params), pols, hooks)
	if err != nil {
		if ctx.Err() != nil {
			return errorf(KindUnavailable, "compare stopped: %v", ctx.Err())
		}
		return errorf(KindInvalid, "compare: %s", trimPrefix(err.Error()))
	}
	for i := range runs {
		reps[i].Skipped = skipped
		runs[i].Report = reps[i]
	}
	return c.JSON(http.StatusOK, map[string]any{"runs": runs})
}
