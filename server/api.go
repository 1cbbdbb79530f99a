package server

import (
	"bytes"
	"crypto/subtle"
	"encoding/csv"
	"encoding/json"
	"io"
	"io/fs"
	"net/http"
	"strconv"
	"strings"

	"github.com/labstack/echo/v4"

	"sparsewatch/web"
)

// Roles a token grants.
const (
	roleOwner  = "owner"
	roleViewer = "viewer"
)

// maxJSONBody bounds JSON request bodies (params, camera sources).
const maxJSONBody = 1 << 20

func (s *Server) routes() *echo.Echo {
	e := echo.New()
	e.HideBanner, e.HidePort = true, true
	e.HTTPErrorHandler = s.httpError
	e.Use(func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			h := c.Response().Header()
			h.Set("X-Content-Type-Options", "nosniff")
			h.Set("X-Frame-Options", "DENY")
			return next(c)
		}
	})

	e.POST("/api/sessions", s.handleCreate)
	e.GET("/api/sessions", s.handleList)
	e.GET("/api/sessions/:id", s.handleStatus)
	e.GET("/api/sessions/:id/report", s.handleReport)
	e.GET("/api/sessions/:id/alarms.csv", s.handleAlarmsCSV)
	e.GET("/api/sessions/:id/alarms.jsonl", s.handleAlarmsJSONL)
	e.GET("/api/sessions/:id/stats.csv", s.handleStatsCSV)
	e.PATCH("/api/sessions/:id/params", s.handleParams)
	// calibrate = new parameters (usually arl0) and a fresh review, whose
	// calibration progress reaches the viewers as "calibration" messages.
	e.POST("/api/sessions/:id/calibrate", s.handleParams)
	e.POST("/api/sessions/:id/compare", s.handleCompare)
	// budget planner (planner.go) and the HTML review report (reportfile.go)
	e.POST("/api/sessions/:id/plan", s.handlePlanStart)
	e.GET("/api/sessions/:id/plan", s.handlePlanGet)
	e.DELETE("/api/sessions/:id/plan", s.handlePlanCancel)
	e.GET("/api/sessions/:id/report.html", s.handleReportHTML)
	e.GET("/api/share/:token", s.handleShareLookup)
	e.GET("/api/demos", func(c echo.Context) error {
		return c.JSON(http.StatusOK, map[string]any{"demos": demoList()})
	})
	e.GET("/ws/sessions/:id", s.handleWS)

	page := func(c echo.Context) error { return s.servePage(c) }
	e.GET("/watch/:id", page)
	e.GET("/share/:token", func(c echo.Context) error {
		if s.shareSession(c.Param("token")) == nil {
			// A person followed this link: answer a page, not JSON.
			return c.HTML(http.StatusNotFound, badShareLinkPage)
		}
		return s.servePage(c)
	})
	e.StaticFS("/", web.FS)
	return e
}

// badShareLinkPage answers a share link that names no session (mistyped,
// or the session was deleted).
const badShareLinkPage = `<!doctype html><html lang="en"><head><meta charset="utf-8"><title>Link not valid - sparsewatch</title>
<link rel="stylesheet" href="/style.css"></head><body><main class="card"><h1>This watch link is not valid</h1>
<p>No session answers to it: the link may be mistyped or cut short, or the session was deleted. Ask the person who shared it for a new one.</p>
<p><a href="/">Go to the start page</a></p></main></body></html>`

// httpError is echo's error handler: statusOf picks the code, internal
// errors are logged in full and answered with a generic message.
func (s *Server) httpError(err error, c echo.Context) {
	if c.Response().Committed {
		return
	}
	var he *echo.HTTPError
	code, msg := statusOf(err)
	if asHTTPError(err, &he) {
		code = he.Code
		msg = http.StatusText(code)
		if m, ok := he.Message.(string); ok && code < 500 {
			msg = m
		}
		if he.Internal != nil {
			err = he.Internal
			code, msg = statusOf(err)
		}
	}
	logError(s.log, code, c.Request().Method, c.Request().URL.Path, err)
	if c.Request().Method == http.MethodHead {
		c.NoContent(code)
		return
	}
	c.JSON(code, map[string]string{"error": msg})
}

func asHTTPError(err error, he **echo.HTTPError) bool {
	h, ok := err.(*echo.HTTPError)
	if ok {
		*he = h
	}
	return ok
}

func (s *Server) servePage(c echo.Context) error {
	data, err := fs.ReadFile(web.FS, "index.html")
	if err != nil {
		return err
	}
	c.Response().Header().Set("Cache-Control", "no-store")
	c.Response().Header().Set("Referrer-Policy", "no-referrer") // keep tokens out of Referer
	return c.HTMLBlob(http.StatusOK, data)
}

// token returns the token of a request: "Authorization: Bearer T" or ?token=T.
func token(r *http.Request) string {
	if h := r.Header.Get("Authorization"); h != "" {
		if t, ok := strings.CutPrefix(h, "Bearer "); ok {
			return strings.TrimSpace(t)
		}
	}
	return r.URL.Query().Get("token")
}

// role returns what tok grants on the session, or "".
func (sess *Session) role(tok string) string {
	sess.mu.Lock()
	owner, share := sess.meta.OwnerToken, sess.meta.ShareToken
	sess.mu.Unlock()
	switch {
	case tok == "":
		return ""
	case subtle.ConstantTimeCompare([]byte(tok), []byte(owner)) == 1:
		return roleOwner
	case subtle.ConstantTimeCompare([]byte(tok), []byte(share)) == 1:
		return roleViewer
	}
	return ""
}

// authorize finds the session of the request and checks its token: any
// valid token may read; only the owner token may write.
func (s *Server) authorize(c echo.Context, write bool) (*Session, string, error) {
	sess, err := s.session(c.Param("id"))
	if err != nil {
		return nil, "", err
	}
	tok := token(c.Request())
	if tok == "" {
		return nil, "", errorf(KindUnauthorized, "this needs a token (Authorization: Bearer TOKEN or ?token=TOKEN)")
	}
	role := sess.role(tok)
	switch {
	case role == "":
		return nil, "", errorf(KindForbidden, "the token does not belong to this session")
	case write && role != roleOwner:
		return nil, "", errorf(KindForbidden, "a share link can watch this session but not change it")
	}
	return sess, role, nil
}

func (s *Server) shareSession(tok string) *Session {
	if tok == "" {
		return nil
	}
	s.mu.RLock()
	defer s.mu.RUnlock()
	return s.byShare[tok]
}

// createdResponse is the 201 body of POST /api/sessions.
type createdResponse struct {
	ID         string `json:"id"`
	OwnerToken string `json:"owner_token"`
	ShareToken string `json:"share_token"`
	OwnerURL   string `json:"owner_url"`
	ShareURL   string `json:"share_url"`
}

func (s *Server) created(c echo.Context, sess *Session) error {
	sess.mu.Lock()
	m := sess.meta
	sess.mu.Unlock()
	return c.JSON(http.StatusCreated, createdResponse{
		ID: m.ID, OwnerToken: m.OwnerToken, ShareToken: m.ShareToken,
		OwnerURL: s.ownerURL(m.ID, m.OwnerToken), ShareURL: s.shareURL(m.ShareToken),
	})
}

// handleCreate makes a session from a multipart upload or a JSON source.
func (s *Server) handleCreate(c echo.Context) error {
	r := c.Request()
	ct := r.Header.Get("Content-Type")
	if strings.HasPrefix(ct, "multipart/") {
		sess, err := s.createFromUpload(c.Response(), r)
		if err != nil {
			return err
		}
		return s.created(c, sess)
	}
	body, err := io.ReadAll(http.MaxBytesReader(c.Response(), r.Body, maxJSONBody))
	if err != nil {
		return err
	}
	var req struct {
		Source struct {
			Kind     string `json:"kind"`
			Scenario string `json:"scenario"`
			URL      string `json:"url"`
			Path     string `json:"path"`
		} `json:"source"`
		Name   string          `json:"name"`
		Params json.RawMessage `json:"params"`
	}
	if err := json.Unmarshal(body, &req); err != nil {
		return errorf(KindInvalid, "body: want multipart \"files\" or JSON {\"source\":{...},\"params\":{...}}: %v", err)
	}
	switch req.Source.Kind {
	case kindCameraURL, kindFolder, kindBrowserCamera, kindStdin:
		sess, err := s.createLive(req.Source.Kind, req.Source.URL, req.Source.Path, req.Name, req.Params)
		if err != nil {
			return err
		}
		return s.created(c, sess)
	}
	p, err := decodeParams(DefaultParams(), req.Params)
	if err != nil {
		return err
	}
	switch req.Source.Kind {
	case "demo":
		var set map[string]json.RawMessage
		json.Unmarshal(req.Params, &set)
		keys := map[string]bool{}
		for k := range set {
			keys[k] = true
		}
		sess, err := s.CreateDemo(req.Source.Scenario, req.Name, p, keys)
		if err != nil {
			return err
		}
		return s.created(c, sess)
	case "":
		return errorf(KindInvalid, "source.kind missing (demo, camera-url, folder or browser-camera), or send multipart \"files\"")
	}
	return errorf(KindInvalid, "source.kind %q unknown (demo, camera-url, folder or browser-camera)", req.Source.Kind)
}

func (s *Server) handleList(c echo.Context) error {
	type item struct {
		ID          string `json:"id"`
		Name        string `json:"name"`
		Source      string `json:"source"`
		State       string `json:"state"`
		FramesSeen  int    `json:"frames_seen"`
		FramesTotal int    `json:"frames_total"`
		Frame       int    `json:"frame"`
		Alarms      int    `json:"alarms"`
		Created     string `json:"created"`
	}
	all := s.list()
	out := make([]item, len(all))
	for i, st := range all {
		out[i] = item{st.ID, st.Name, st.Source, st.State, st.FramesSeen, st.FramesTotal, st.Frame, st.Alarms, st.Created.Format("2006-01-02T15:04:05Z")}
	}
	return c.JSON(http.StatusOK, map[string]any{"sessions": out})
}

func (s *Server) handleStatus(c echo.Context) error {
	sess, role, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	st := sess.Status()
	if role == roleOwner {
		st.ShareURL = s.shareURL(sess.metaCopy().ShareToken)
	}
	return c.JSON(http.StatusOK, st)
}

func (s *Server) handleReport(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	return c.JSON(http.StatusOK, sess.Report())
}

func (s *Server) handleAlarmsJSONL(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	for _, a := range sess.Alarms() {
		if err := enc.Encode(a); err != nil {
			return err
		}
	}
	c.Response().Header().Set("Content-Disposition", `attachment; filename="alarms.jsonl"`)
	return c.Blob(http.StatusOK, "application/jsonl", buf.Bytes())
}

func (s *Server) handleAlarmsCSV(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	w := csv.NewWriter(&buf)
	w.Write([]string{"frame", "end_frame", "peak", "region", "x0", "y0", "x1", "y1", "centroid_x", "centroid_y", "area", "onset", "region_peak"})
	f := func(v float64) string { return strconv.FormatFloat(v, 'g', 6, 64) }
	for _, a := range sess.Alarms() {
		head := []string{strconv.Itoa(a.Frame), strconv.Itoa(a.EndFrame), f(a.Peak)}
		if len(a.Regions) == 0 {
			w.Write(append(head, "", "", "", "", "", "", "", "", "", ""))
		}
		for i, r := range a.Regions {
			w.Write(append(append([]string{}, head...), strconv.Itoa(i),
				strconv.Itoa(r.BBox[0]), strconv.Itoa(r.BBox[1]), strconv.Itoa(r.BBox[2]), strconv.Itoa(r.BBox[3]),
				f(r.Centroid[0]), f(r.Centroid[1]), strconv.Itoa(r.Area), strconv.Itoa(r.Onset), f(r.Peak)))
		}
	}
	w.Flush()
	c.Response().Header().Set("Content-Disposition", `attachment; filename="alarms.csv"`)
	return c.Blob(http.StatusOK, "text/csv; charset=utf-8", buf.Bytes())
}

func (s *Server) handleStatsCSV(c echo.Context) error {
	sess, _, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	c.Response().Header().Set("Content-Disposition", `attachment; filename="stats.csv"`)
	c.Response().Header().Set("Content-Type", "text/csv; charset=utf-8")
	return c.File(sess.dir + "/" + statsFileName)
}

func (s *Server) handleParams(c echo.Context) error {
	sess, _, err := s.authorize(c, true)
	if err != nil {
		return err
	}
	body, err := io.ReadAll(http.MaxBytesReader(c.Response(), c.Request().Body, maxJSONBody))
	if err != nil {
		return err
	}
	sess.mu.Lock()
	cur := sess.meta.Params
	sess.mu.Unlock()
	p, err := sess.patchParams(cur, body)
	if err != nil {
		return err
	}
	if err := sess.setParams(s.ctx, p); err != nil {
		return err
	}
	return c.JSON(http.StatusOK, sess.Status())
}

func (s *Server) handleShareLookup(c echo.Context) error {
	sess := s.shareSession(c.Param("token"))
	if sess == nil {
		return errorf(KindNotFound, "this share link is not valid")
	}
	return c.JSON(http.StatusOK, map[string]string{"id": sess.metaCopy().ID, "role": roleViewer})
}
