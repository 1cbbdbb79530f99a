package live

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image"
	"image/jpeg"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"sparsewatch/samples"
)

var quiet = slog.New(slog.NewTextHandler(io.Discard, nil))

// demoJPEGs encodes frames [from, from+n) of the furnace scenario as 8-bit
// JPEGs, the way a network camera would send them.
func demoJPEGs(tb testing.TB, from, n int) [][]byte {
	tb.Helper()
	s, err := samples.Lookup("furnace")
	if err != nil {
		tb.Fatal(err)
	}
	g16 := image.NewGray16(image.Rect(0, 0, s.Width, s.Height))
	g8 := image.NewGray(g16.Rect)
	var out [][]byte
	for i := from; i < from+n; i++ {
		if err := s.FrameInto(g16, i); err != nil {
			tb.Fatal(err)
		}
		for p := range g8.Pix {
			v := (int(g16.Pix[2*p])<<8 | int(g16.Pix[2*p+1])) - 10000
			g8.Pix[p] = uint8(min(max(v/70, 0), 255))
		}
		var b bytes.Buffer
		if err := jpeg.Encode(&b, g8, &jpeg.Options{Quality: 90}); err != nil {
			tb.Fatal(err)
		}
		out = append(out, b.Bytes())
	}
	return out
}

const testBoundary = "sparseframe"

// writePart writes one MJPEG part with Content-Length and flushes it.
func writePart(w io.Writer, data []byte) error {
	if _, err := fmt.Fprintf(w, "--%s\r\nContent-Type: image/jpeg\r\nContent-Length: %d\r\n\r\n", testBoundary, len(data)); err != nil {
		return err
	}
	if _, err := w.Write(data); err != nil {
		return err
	}
	if _, err := io.WriteString(w, "\r\n"); err != nil {
		return err
	}
	if f, ok := w.(http.Flusher); ok {
		f.Flush()
	}
	return nil
}

// mjpegServer serves parts as one MJPEG stream per request and counts
// requests; each request gets the parts that conn(n) returns.
func mjpegServer(tb testing.TB, conn func(n int) [][]byte) (*httptest.Server, *atomic.Int64) {
	tb.Helper()
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		n := int(hits.Add(1))
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
		for _, p := range conn(n) {
			if err := writePart(w, p); err != nil {
				return
			}
		}
	}))
	tb.Cleanup(srv.Close)
	return srv, &hits
}

func mustAllow(tb testing.TB, prefixes ...string) *AllowList {
	tb.Helper()
	a, err := NewAllowList(prefixes...)
	if err != nil {
		tb.Fatal(err)
	}
	return a
}

func mustCamera(tb testing.TB, cfg CameraConfig) *Camera {
	tb.Helper()
	if cfg.Logger == nil {
		cfg.Logger = quiet
	}
	c, err := NewCamera(cfg)
	if err != nil {
		tb.Fatal(err)
	}
	return c
}

// collect runs c until want frames arrived or the deadline passed.
func collect(tb testing.TB, c *Camera, want int) ([]Frame, error) {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	var got []Frame
	for f := range c.Frames() {
		got = append(got, f)
		if len(got) == want {
			cancel()
		}
	}
	err := <-done
	if len(got) < want {
		tb.Fatalf("got %d frames, want %d (run ended: %v)", len(got), want, err)
	}
	return got, err
}

type eventLog struct {
	mu sync.Mutex
	ev []Event
}

func (l *eventLog) add(e Event) { l.mu.Lock(); l.ev = append(l.ev, e); l.mu.Unlock() }

func (l *eventLog) count(k EventKind) int {
	l.mu.Lock()
	defer l.mu.Unlock()
	n := 0
	for _, e := range l.ev {
		if e.Kind == k {
			n++
		}
	}
	return n
}

func TestCameraMJPEG(t *testing.T) {
	parts := demoJPEGs(t, 198, 6)
	srv, hits := mjpegServer(t, func(int) [][]byte { return parts })
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/stream", Allow: mustAllow(t, srv.URL+"/"), Queue: len(parts)})
	got, _ := collect(t, c, len(parts))
	for i, f := range got {
		if !bytes.Equal(f.Data, parts[i]) {
			t.Errorf("frame %d: bytes differ from the part served", i)
		}
		if f.Format != "jpeg" || f.Seq != uint64(i) || !strings.Contains(f.Name, "#part") {
			t.Errorf("frame %d: format %q seq %d name %q", i, f.Format, f.Seq, f.Name)
		}
	}
	if n := c.Counts(); n.Received != uint64(len(parts)) || n.Dropped != 0 || n.Bad != 0 {
		t.Errorf("counts %+v", n)
	}
	if hits.Load() != 1 {
		t.Errorf("%d requests, want 1", hits.Load())
	}
}

func TestCameraCorruptPartSkipped(t *testing.T) {
	good := demoJPEGs(t, 0, 2)
	cut := good[0][:len(good[0])/2]                                 // no end-of-image marker
	badHeader := append([]byte{0xFF, 0xD8, 0xFF, 0x01}, 0xFF, 0xD9) // markers but no frame header
	parts := [][]byte{good[0], cut, []byte("not an image"), badHeader, good[1]}
	srv, _ := mjpegServer(t, func(int) [][]byte { return parts })
	var log eventLog
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL), Queue: 8, Events: log.add})
	got, _ := collect(t, c, 2)
	if !bytes.Equal(got[0].Data, good[0]) || !bytes.Equal(got[1].Data, good[1]) {
		t.Error("the good parts around the bad ones were not delivered intact")
	}
	if n := c.Counts(); n.Bad != 3 {
		t.Errorf("bad parts %d, want 3 (%+v)", n.Bad, n)
	}
	if log.count(EventBadFrame) != 3 {
		t.Errorf("%d bad-frame events, want 3", log.count(EventBadFrame))
	}
}

// TestCameraReconnect cuts the first connection inside a part; the source
// reports the cut part, reconnects and goes on with the second connection.
func TestCameraReconnect(t *testing.T) {
	parts := demoJPEGs(t, 200, 5)
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if hits.Add(1) == 1 {
			conn, buf, err := http.NewResponseController(w).Hijack()
			if err != nil {
				t.Error(err)
				return
			}
			defer conn.Close()
			fmt.Fprintf(buf, "HTTP/1.1 200 OK\r\nContent-Type: multipart/x-mixed-replace; boundary=%s\r\nConnection: close\r\n\r\n", testBoundary)
			writePart(buf, parts[0])
			writePart(buf, parts[1])
			fmt.Fprintf(buf, "--%s\r\nContent-Type: image/jpeg\r\nContent-Length: %d\r\n\r\n", testBoundary, len(parts[2]))
			buf.Write(parts[2][:100])
			buf.Flush()
			return // the connection drops in the middle of part 2
		}
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
		for _, p := range parts[2:] {
			writePart(w, p)
		}
	}))
	defer srv.Close()
	var log eventLog
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL+"/"), Queue: 8,
		MinBackoff: 5 * time.Millisecond, Events: log.add})
	got, _ := collect(t, c, 5)
	for i, f := range got {
		if !bytes.Equal(f.Data, parts[i]) {
			t.Errorf("frame %d differs", i)
		}
	}
	n := c.Counts()
	if n.Reconnects < 1 || n.Bad != 1 {
		t.Errorf("counts %+v, want a reconnect and one cut part", n)
	}
	if log.count(EventReconnecting) < 1 || log.count(EventConnected) < 2 {
		t.Errorf("events: %d reconnecting, %d connected", log.count(EventReconnecting), log.count(EventConnected))
	}
}

// TestCameraStalled: a camera that stops sending without closing counts as
// a drop after the idle timeout.
func TestCameraStalled(t *testing.T) {
	parts := demoJPEGs(t, 0, 2)
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
		writePart(w, parts[hits.Add(1)%2])
		<-r.Context().Done() // stall until the client gives up
	}))
	defer srv.Close()
	var log eventLog
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL+"/"), Queue: 8,
		IdleTimeout: 100 * time.Millisecond, MinBackoff: 5 * time.Millisecond, Events: log.add})
	collect(t, c, 2)
	if c.Counts().Reconnects < 1 || log.count(EventReconnecting) < 1 {
		t.Errorf("no reconnect after a stall: %+v", c.Counts())
	}
	log.mu.Lock()
	defer log.mu.Unlock()
	for _, e := range log.ev {
		if e.Kind == EventReconnecting && !strings.Contains(e.Err.Error(), "no data for") {
			t.Errorf("reconnect reason %q, want the idle timeout", e.Err)
		}
	}
}

// TestCameraDropsWhenSlow: a consumer that does not read keeps the newest
// frames; every other frame is counted as dropped.
func TestCameraDropsWhenSlow(t *testing.T) {
	parts := demoJPEGs(t, 0, 10)
	release := make(chan struct{})
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
		for _, p := range parts {
			writePart(w, p)
		}
		select { // hold the connection so no reconnect adds frames
		case <-release:
		case <-r.Context().Done():
		}
	}))
	defer srv.Close()
	defer close(release)
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL+"/"), Queue: 2})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	deadline := time.Now().Add(10 * time.Second)
	for c.Counts().Received < 10 && time.Now().Before(deadline) {
		time.Sleep(5 * time.Millisecond)
	}
	n := c.Counts()
	if n.Received != 10 || n.Dropped != 8 || n.Queued != 2 {
		t.Fatalf("counts %+v, want 10 received, 8 dropped, 2 queued", n)
	}
	for _, want := range []uint64{8, 9} {
		f := <-c.Frames()
		if f.Seq != want || !bytes.Equal(f.Data, parts[want]) {
			t.Errorf("queued frame seq %d, want %d (the newest)", f.Seq, want)
		}
	}
	cancel()
	if err := <-done; !errors.Is(err, context.Canceled) {
		t.Errorf("Run returned %v, want context.Canceled", err)
	}
}

func TestCameraSnapshotPolling(t *testing.T) {
	parts := demoJPEGs(t, 0, 3)
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		n := hits.Add(1) - 1
		w.Header().Set("Content-Type", "image/jpeg")
		w.Write(parts[n%3])
	}))
	defer srv.Close()
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/snapshot.jpg", Allow: mustAllow(t, srv.URL+"/snapshot.jpg"),
		Poll: 10 * time.Millisecond, Queue: 8})
	got, _ := collect(t, c, 3)
	for i, f := range got {
		if !bytes.Equal(f.Data, parts[i]) {
			t.Errorf("snapshot %d differs", i)
		}
	}
	if c.Counts().Reconnects < 2 {
		t.Errorf("counts %+v: each snapshot is a new request", c.Counts())
	}
}

// TestCameraRefused: URLs outside the allow-list are refused before any
// request, and a redirect to an unlisted host is refused before it is
// followed; the unlisted server never sees a request.
func TestCameraRefused(t *testing.T) {
	parts := demoJPEGs(t, 0, 1)
	unlisted, unlistedHits := mjpegServer(t, func(int) [][]byte { return parts })
	var listedHits atomic.Int64
	listed := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		listedHits.Add(1)
		switch r.URL.Path {
		case "/cam/away":
			http.Redirect(w, r, unlisted.URL+"/cam/stream", http.StatusFound)
		case "/cam/moved":
			http.Redirect(w, r, "/cam/stream", http.StatusMovedPermanently)
		case "/cam/stream":
			w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
			writePart(w, parts[0])
		default:
			http.NotFound(w, r)
		}
	}))
	defer listed.Close()
	allow := mustAllow(t, listed.URL+"/cam/")

	// Same host (127.0.0.1), another port: refused with nothing fetched.
	for _, u := range []string{unlisted.URL + "/cam/stream", listed.URL + "/other", "file:///etc/passwd", "ftp://" + listed.Listener.Addr().String() + "/cam/"} {
		_, err := NewCamera(CameraConfig{URL: u, Allow: allow, Logger: quiet})
		var ref *RefusedError
		if !errors.As(err, &ref) {
			t.Errorf("NewCamera(%q) = %v, want a RefusedError", u, err)
		}
	}

	var log eventLog
	c := mustCamera(t, CameraConfig{URL: listed.URL + "/cam/away", Allow: allow, Events: log.add})
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	err := c.Run(ctx)
	var ref *RefusedError
	if !errors.As(err, &ref) || !strings.Contains(ref.URL, unlisted.Listener.Addr().String()) {
		t.Errorf("redirect to an unlisted host: Run = %v, want a RefusedError naming it", err)
	}
	if log.count(EventRefused) != 1 {
		t.Errorf("%d refused events, want 1", log.count(EventRefused))
	}
	if unlistedHits.Load() != 0 {
		t.Errorf("the unlisted server got %d requests", unlistedHits.Load())
	}

	// A redirect that stays under the prefix is followed.
	c = mustCamera(t, CameraConfig{URL: listed.URL + "/cam/moved", Allow: allow})
	got, _ := collect(t, c, 1)
	if !bytes.Equal(got[0].Data, parts[0]) {
		t.Error("frame after an allowed redirect differs")
	}
	if unlistedHits.Load() != 0 {
		t.Errorf("the unlisted server got %d requests", unlistedHits.Load())
	}
}

func TestCameraBadStatusBacksOff(t *testing.T) {
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hits.Add(1)
		http.Error(w, "busy", http.StatusServiceUnavailable)
	}))
	defer srv.Close()
	var log eventLog
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL+"/"),
		MinBackoff: 20 * time.Millisecond, MaxBackoff: 80 * time.Millisecond, Events: log.add})
	ctx, cancel := context.WithTimeout(context.Background(), 400*time.Millisecond)
	defer cancel()
	c.Run(ctx)
	// Waits 20, 40, 80, 80, ... ms (plus up to 20% jitter): at most about
	// 7 tries in 400 ms; without back-off it would be hundreds.
	if h := hits.Load(); h < 3 || h > 8 {
		t.Errorf("%d requests in 400 ms with back-off 20..80 ms", h)
	}
	log.mu.Lock()
	defer log.mu.Unlock()
	var last time.Duration
	for _, e := range log.ev {
		if e.Kind != EventReconnecting {
			continue
		}
		if !strings.Contains(e.Err.Error(), "503") {
			t.Errorf("reason %q does not name the status", e.Err)
		}
		if e.Wait < last && e.Wait < 80*time.Millisecond {
			t.Errorf("wait shrank from %v to %v", last, e.Wait)
		}
		last = e.Wait
	}
}

func TestCheckImage(t *testing.T) {
	good := demoJPEGs(t, 0, 1)[0]
	for _, tc := range []struct {
		name string
		data []byte
		max  int64
		ok   bool
	}{
		{"GoodJPEG", good, 1 << 20, true},
		{"TrailingPadding", append(append([]byte{}, good...), 0, 0, '\r', '\n'), 1 << 20, true},
		{"Cut", good[:len(good)-10], 1 << 20, false},
		{"OverPixelLimit", good, 1000, false},
		{"Text", []byte("hello"), 1 << 20, false},
		{"Empty", nil, 1 << 20, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if err := CheckImage(tc.data, tc.max); (err == nil) != tc.ok {
				t.Errorf("CheckImage = %v, want ok=%v", err, tc.ok)
			}
		})
	}
}
