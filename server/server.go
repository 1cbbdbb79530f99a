package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"time"

	"github.com/labstack/echo/v4"
)

// HTTP server timeouts. Uploads of many frames take a while on a slow link,
// hence the long read timeout; websocket connections manage their own
// deadlines after the upgrade.
const (
	readHeaderTimeout = 10 * time.Second
	readTimeout       = 10 * time.Minute
	writeTimeout      = 2 * time.Minute
	idleTimeout       = 2 * time.Minute
	shutdownTimeout   = 10 * time.Second

	defaultMaxUpload = 1 << 30
	defaultMaxPixels = 64 << 20
)

// Options configure a Server. Zero values select the defaults.
type Options struct {
	DataDir        string   // data directory (sessions/<id>/...); required
	Addr           string   // listen address for ListenAndServe, e.g. 127.0.0.1:8080
	MaxUploadBytes int64    // largest upload request body (default 1 GiB)
	MaxPixels      int      // largest frame, width*height (default 64 Mpixel)
	AllowCameraURL []string // URL prefixes the server may fetch frames from
	WatchRoot      string   // folder inside which sessions may watch folders ("" = none)
	Logger         *slog.Logger
}

// Server owns the sessions and the HTTP handler.
type Server struct {
	opt  Options
	log  *slog.Logger
	echo *echo.Echo
	ctx  context.Context // parent of every session's review
	stop context.CancelFunc

	mu       sync.RWMutex // guards sessions and byShare
	sessions map[string]*Session
	byShare  map[string]*Session
	baseURL  string // scheme://host of the listener, for owner_url/share_url; "" = relative

	compareSlot chan struct{} // one compare at a time
	lock        *os.File      // exclusive lock on the data directory

	stdinID   string    // the session fed from standard input, if any (live.go)
	stdinFeed *liveFeed // its feed

	// review runs one session's frames; tests and the default loop set it.
	review func(ctx context.Context, s *Session) (*Report, error)
}

// New opens (or creates) the data directory, lists the sessions found
// there and resumes the reviews that did not finish.
func New(opt Options) (*Server, error) {
	if opt.DataDir == "" {
		return nil, errors.New("server: a data directory is required")
	}
	if opt.MaxUploadBytes <= 0 {
		opt.MaxUploadBytes = defaultMaxUpload
	}
	if opt.MaxPixels <= 0 {
		opt.MaxPixels = defaultMaxPixels
	}
	if opt.Logger == nil {
		opt.Logger = slog.Default()
	}
	if err := os.MkdirAll(filepath.Join(opt.DataDir, "sessions"), 0o755); err != nil {
		return nil, fmt.Errorf("server: data directory: %w", err)
	}
	lock, err := lockDataDir(opt.DataDir)
	if err != nil {
		return nil, err
	}
	ctx, stop := context.WithCancel(context.Background())
	s := &Server{lock: lock,
		opt: opt, log: opt.Logger, ctx: ctx, stop: stop,
		sessions: map[string]*Session{}, byShare: map[string]*Session{},
		compareSlot: make(chan struct{}, 1),
	}
	s.review = defaultReview
	s.echo = s.routes()
	if err := s.loadSessions(); err != nil {
		stop()
		lock.Close()
		return nil, err
	}
	return s, nil
}

// Handler returns the HTTP handler (API, websocket and the page).
func (s *Server) Handler() http.Handler { return s.echo }

// loadSessions lists every session of the data directory again; unfinished
// reviews resume where they stopped.
func (s *Server) loadSessions() error {
	root := filepath.Join(s.opt.DataDir, "sessions")
	ents, err := os.ReadDir(root)
	if err != nil {
		return fmt.Errorf("server: list sessions: %w", err)
	}
	for _, e := range ents {
		if !e.IsDir() || !validID(e.Name()) {
			continue
		}
		dir := filepath.Join(root, e.Name())
		m, err := loadMeta(dir)
		if err != nil {
			s.log.Warn("session not loaded", "dir", dir, "err", err)
			continue
		}
		sess := newSession(s, dir, m)
		finished, err := sess.loadFinished()
		if err != nil {
			s.log.Warn("session report not loaded; reviewing again", "dir", dir, "err", err)
		}
		s.add(sess)
		if !finished {
			sess.start(s.ctx)
		}
	}
	return nil
}

func (s *Server) add(sess *Session) {
	s.mu.Lock()
	s.sessions[sess.meta.ID] = sess
	s.byShare[sess.meta.ShareToken] = sess
	s.mu.Unlock()
}

func (s *Server) session(id string) (*Session, error) {
	s.mu.RLock()
	sess := s.sessions[id]
	s.mu.RUnlock()
	if sess == nil {
		return nil, errorf(KindNotFound, "no session %q", id)
	}
	return sess, nil
}

// list returns every session's status, newest first.
func (s *Server) list() []Status {
	s.mu.RLock()
	out := make([]Status, 0, len(s.sessions))
	for _, sess := range s.sessions {
		out = append(out, sess.Status())
	}
	s.mu.RUnlock()
	sort.Slice(out, func(i, j int) bool {
		if !out[i].Created.Equal(out[j].Created) {
			return out[i].Created.After(out[j].Created)
		}
		return out[i].ID < out[j].ID
	})
	return out
}

// createSession writes session.json for a new session whose frames (if
// any) are already in dir, registers it and starts its review.
func (s *Server) createSession(id, dir, name string, src Source, p Params) (*Session, error) {
	owner, err := newToken()
	if err != nil {
		return nil, err
	}
	share, err := newToken()
	if err != nil {
		return nil, err
	}
	m := meta{ID: id, Name: name, Created: time.Now().UTC(), OwnerToken: owner, ShareToken: share, Params: p, Source: src}
	if err := saveMeta(dir, m); err != nil {
		return nil, err
	}
	sess := newSession(s, dir, m)
	s.add(sess)
	sess.start(s.ctx)
	s.log.Info("session created", "session", id, "source", src.Kind, "files", len(src.Files))
	return sess, nil
}

// newSessionDir makes DATA/sessions/<new id>/frames.
func (s *Server) newSessionDir() (id, dir string, err error) {
	for range 5 {
		id, err = newID()
		if err != nil {
			return "", "", err
		}
		dir = filepath.Join(s.opt.DataDir, "sessions", id)
		if err = os.Mkdir(dir, 0o755); err == nil {
			if err = os.Mkdir(filepath.Join(dir, framesDirName), 0o755); err != nil {
				return "", "", fmt.Errorf("server: session directory: %w", err)
			}
			return id, dir, nil
		}
		if !os.IsExist(err) {
			return "", "", fmt.Errorf("server: session directory: %w", err)
		}
	}
	return "", "", fmt.Errorf("server: session directory: %w", err)
}

// SetBaseURL sets scheme://host used in owner_url and share_url.
func (s *Server) SetBaseURL(u string) {
	s.mu.Lock()
	s.baseURL = u
	s.mu.Unlock()
}

func (s *Server) base() string {
	s.mu.RLock()
	defer s.mu.RUnlock()
	return s.baseURL
}

func (s *Server) ownerURL(id, token string) string {
	return s.base() + "/watch/" + id + "#token=" + token
}

func (s *Server) shareURL(token string) string { return s.base() + "/share/" + token }

// Serve serves on ln until ctx is cancelled, then shuts down gracefully
// (shutdownTimeout) and stops every review.
func (s *Server) Serve(ctx context.Context, ln net.Listener) error {
	hs := &http.Server{
		Handler:           s.echo,
		ReadHeaderTimeout: readHeaderTimeout,
		ReadTimeout:       readTimeout,
		WriteTimeout:      writeTimeout,
		IdleTimeout:       idleTimeout,
		ErrorLog:          slog.NewLogLogger(s.log.Handler(), slog.LevelWarn),
	}
	if s.base() == "" {
		s.SetBaseURL("http://" + ln.Addr().String())
	}
	errc := make(chan error, 1)
	go func() { errc <- hs.Serve(ln) }()
	select {
	case err := <-errc:
		s.Close()
		return fmt.Errorf("server: serve: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), shutdownTimeout)
	defer cancel()
	s.stop() // end reviews and websocket connections first
	err := hs.Shutdown(sctx)
	s.Close()
	if err != nil {
		return fmt.Errorf("server: shutdown: %w", err)
	}
	return nil
}

// Close stops every review and waits for them.
func (s *Server) Close() {
	s.stop()
	s.mu.RLock()
	all := make([]*Session, 0, len(s.sessions))
	for _, sess := range s.sessions {
		all = append(all, sess)
	}
	s.mu.RUnlock()
	for _, sess := range all {
		sess.stop()
	}
	s.mu.Lock()
	if s.lock != nil {
		s.lock.Close()
		s.lock = nil
	}
	s.mu.Unlock()
}
