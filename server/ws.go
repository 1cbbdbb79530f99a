package server

import (
	"encoding/json"
	"net/http"
	"net/url"
	"strings"
	"time"

	"github.com/gorilla/websocket"
	"github.com/labstack/echo/v4"
)

// Websocket deadlines. The peer must answer a ping within pongWait, so
// pings go out every pingPeriod < pongWait; a write that takes longer than
// writeWait means the viewer is gone and the connection is closed.
const (
	writeWait   = 10 * time.Second
	pongWait    = 60 * time.Second
	pingPeriod  = pongWait * 9 / 10
	maxInbound  = 8 << 20 // page -> server: a camera frame at most
	minFrameGap = time.Second / 30
)

var upgrader = websocket.Upgrader{
	ReadBufferSize:  4096,
	WriteBufferSize: 32 << 10,
	CheckOrigin:     sameOrigin,
}

// sameOrigin accepts requests without an Origin (not a browser) and
// browser requests whose Origin host equals the Host they were sent to.
func sameOrigin(r *http.Request) bool {
	o := r.Header.Get("Origin")
	if o == "" {
		return true
	}
	u, err := url.Parse(o)
	if err != nil {
		return false
	}
	return strings.EqualFold(u.Host, r.Host)
}

// handleWS upgrades GET /ws/sessions/{id}?token=T and runs one reader and
// one writer goroutine for the connection.
func (s *Server) handleWS(c echo.Context) error {
	sess, role, err := s.authorize(c, false)
	if err != nil {
		return err
	}
	if !sameOrigin(c.Request()) {
		return errorf(KindForbidden, "websocket from another origin")
	}
	ws, err := upgrader.Upgrade(c.Response(), c.Request(), nil)
	if err != nil {
		return nil // the upgrader has answered
	}
	v := newViewer(role)
	hello, err := sess.hello(v, true)
	if err != nil {
		ws.Close()
		return err
	}
	sess.greet(v)
	done := make(chan struct{})
	go s.readLoop(ws, sess, v, done)
	s.writeLoop(ws, sess, v, hello, done)
	sess.hub.remove(v)
	return nil
}

// readLoop handles page -> server messages and pongs; it closes done when
// the connection ends.
func (s *Server) readLoop(ws *websocket.Conn, sess *Session, v *viewer, done chan struct{}) {
	defer close(done)
	ws.SetReadLimit(maxInbound)
	ws.SetReadDeadline(time.Now().Add(pongWait))
	ws.SetPongHandler(func(string) error { return ws.SetReadDeadline(time.Now().Add(pongWait)) })
	for {
		kind, data, err := ws.ReadMessage()
		if err != nil {
			return
		}
		ws.SetReadDeadline(time.Now().Add(pongWait))
		if kind == websocket.BinaryMessage {
			// A camera frame (JPEG or PNG) for a browser-camera session,
			// from its owner only; viewers' frames are ignored.
			if v.role == roleOwner {
				sess.ingest(s.ctx, data)
			}
			continue
		}
		if kind != websocket.TextMessage {
			continue
		}
		var m struct {
			Type  string `json:"type"`
			On    bool   `json:"on"`
			Frame int    `json:"frame"`
		}
		if json.Unmarshal(data, &m) != nil {
			continue
		}
		switch m.Type {
		case "heat":
			sess.hub.setHeat(v, m.On)
		case "seek":
			if v.role == roleOwner {
				go sess.seek(v, m.Frame)
			}
		}
	}
}

// writeLoop sends hello, then whatever the viewer's mailbox holds: text
// events as they come, frame updates at most one per minFrameGap (the
// latest wins), and pings. It returns when the reader ends or a write fails.
func (s *Server) writeLoop(ws *websocket.Conn, sess *Session, v *viewer, hello []byte, done chan struct{}) {
	ping := time.NewTicker(pingPeriod)
	gap := time.NewTimer(time.Hour)
	gap.Stop()
	defer func() {
		ping.Stop()
		gap.Stop()
		ws.Close()
	}()
	write := func(kind int, msg []byte) bool {
		ws.SetWriteDeadline(time.Now().Add(writeWait))
		return ws.WriteMessage(kind, msg) == nil
	}
	if !write(websocket.TextMessage, hello) {
		return
	}
	var lastFrame time.Time
	for {
		select {
		case <-done:
			return
		case <-s.ctx.Done():
			ws.SetWriteDeadline(time.Now().Add(writeWait))
			ws.WriteMessage(websocket.CloseMessage, websocket.FormatCloseMessage(websocket.CloseGoingAway, "server stopping"))
			return
		case <-ping.C:
			ws.SetWriteDeadline(time.Now().Add(writeWait))
			if ws.WriteMessage(websocket.PingMessage, nil) != nil {
				return
			}
			continue
		case <-v.wake:
		case <-gap.C:
		}
		now := time.Now()
		p := v.take(now.Sub(lastFrame) >= minFrameGap)
		if p.resync {
			h, err := sess.hello(v, false)
			if err != nil || !write(websocket.TextMessage, h) {
				return
			}
		}
		for _, ev := range p.events {
			if !write(websocket.TextMessage, ev) {
				return
			}
		}
		if p.frame != nil {
			if !write(websocket.BinaryMessage, p.frame) {
				return
			}
			lastFrame = now
		}
		for _, m := range [][]byte{p.preview, p.heat} {
			if m != nil && !write(websocket.BinaryMessage, m) {
				return
			}
		}
		if p.frameLeft {
			gap.Reset(minFrameGap - now.Sub(lastFrame))
		}
	}
}
