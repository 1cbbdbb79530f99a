package live

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image/jpeg"
	"image/png"
	"io"
	"log/slog"
	"math/rand/v2"
	"mime"
	"net"
	"net/http"
	"strings"
	"sync"
	"sync/atomic"
	"time"
)

// EventKind names what happened to a live source.
type EventKind string

const (
	EventConnected    EventKind = "connected"    // a response started arriving
	EventReconnecting EventKind = "reconnecting" // the feed dropped; waiting Wait before the next try
	EventBadFrame     EventKind = "bad-frame"    // a part or file was skipped (Err says why)
	EventRefused      EventKind = "refused"      // a URL or redirect outside the allow-list; the source stops
)

// Event is one report from a source, for logs and the page.
type Event struct {
	Kind    EventKind
	Time    time.Time
	Err     error
	Wait    time.Duration // before the next attempt (reconnecting)
	Attempt int           // connection attempts so far
}

// CameraConfig sets up a camera-URL source. Zero fields take the defaults
// given beside them.
type CameraConfig struct {
	URL   string
	Allow *AllowList // required: the URL and every redirect must lie under it

	Queue        int           // frames waiting for the consumer (4); older ones are dropped
	Poll         time.Duration // between fetches of a single-image URL (1 s)
	MinBackoff   time.Duration // first wait after a drop (250 ms), doubled per failure
	MaxBackoff   time.Duration // longest wait (15 s)
	IdleTimeout  time.Duration // no byte for this long counts as a drop (15 s)
	MaxPartBytes int           // largest accepted part (16 MB)
	MaxPixels    int64         // largest accepted image (64 Mpx)

	// Check vets a part before it is queued; nil uses CheckImage. A failed
	// check is reported as EventBadFrame and the part is skipped.
	Check func(data []byte, maxPixels int64) error
	// Events, if set, receives every event; it runs on the reader
	// goroutine, so it must return quickly.
	Events func(Event)
	Logger *slog.Logger
}

// Camera reads frames from an MJPEG (multipart/x-mixed-replace) stream or a
// single-image URL that it polls.
type Camera struct {
	cfg    CameraConfig
	client *http.Client
	q      *queue
	n      counters
	once   sync.Once
}

// NewCamera checks the URL against the allow-list before anything is
// fetched; a URL outside it gives a *RefusedError.
func NewCamera(cfg CameraConfig) (*Camera, error) {
	if err := cfg.Allow.Check(cfg.URL); err != nil {
		return nil, err
	}
	def := func(d *time.Duration, v time.Duration) {
		if *d <= 0 {
			*d = v
		}
	}
	def(&cfg.Poll, time.Second)
	def(&cfg.MinBackoff, 250*time.Millisecond)
	def(&cfg.MaxBackoff, 15*time.Second)
	def(&cfg.IdleTimeout, 15*time.Second)
	if cfg.Queue <= 0 {
		cfg.Queue = 4
	}
	if cfg.MaxPartBytes <= 0 {
		cfg.MaxPartBytes = 16 << 20
	}
	if cfg.MaxPixels <= 0 {
		cfg.MaxPixels = 64 << 20
	}
	if cfg.Check == nil {
		cfg.Check = CheckImage
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.Default()
	}
	c := &Camera{cfg: cfg}
	c.q = newQueue(cfg.Queue, true, &c.n)
	allow := cfg.Allow
	c.client = &http.Client{
		Transport: &http.Transport{
			Proxy:                 nil, // connect directly: the allow-list names the real host
			DialContext:           (&net.Dialer{Timeout: 10 * time.Second}).DialContext,
			TLSHandshakeTimeout:   10 * time.Second,
			ResponseHeaderTimeout: cfg.IdleTimeout,
			MaxIdleConns:          2,
		},
		// Every hop is checked before it is requested, so a listed camera
		// cannot bounce the server to an unlisted address.
		CheckRedirect: func(req *http.Request, via []*http.Request) error {
			if len(via) >= 5 {
				return errors.New("frames: camera URL: more than 5 redirects")
			}
			return allow.CheckURL(req.URL)
		},
	}
	return c, nil
}

// Frames is where frames arrive; it is closed when Run returns.
func (c *Camera) Frames() <-chan Frame { return c.q.ch }

// Counts returns the running totals.
func (c *Camera) Counts() Counts { return c.n.snapshot() }

func (c *Camera) emit(e Event) {
	e.Time = time.Now()
	switch e.Kind {
	case EventBadFrame:
		c.cfg.Logger.Warn("camera: frame skipped", "url", c.cfg.URL, "err", e.Err)
	case EventReconnecting:
		c.cfg.Logger.Info("camera: reconnecting", "url", c.cfg.URL, "wait", e.Wait, "err", e.Err)
	case EventRefused:
		c.cfg.Logger.Warn("camera: refused", "url", c.cfg.URL, "err", e.Err)
	}
	if c.cfg.Events != nil {
		c.cfg.Events(e)
	}
}

// Run reads until ctx ends (returning ctx.Err()) or a redirect leaves the
// allow-list (returning the *RefusedError). Dropped connections, bad
// statuses and cut streams are retried with exponential back-off. Run may
// be called once.
func (c *Camera) Run(ctx context.Context) error {
	defer c.once.Do(func() { close(c.q.ch) })
	wait := c.cfg.MinBackoff
	for attempt := 1; ; attempt++ {
		if attempt > 1 {
			c.n.reconnects.Add(1)
		}
		got, snapshot, err := c.fetch(ctx, attempt)
		if ctx.Err() != nil {
			return ctx.Err()
		}
		var ref *RefusedError
		if errors.As(err, &ref) {
			c.emit(Event{Kind: EventRefused, Err: ref, Attempt: attempt})
			return ref
		}
		var pause time.Duration
		switch {
		case snapshot && err == nil:
			pause, wait = c.cfg.Poll, c.cfg.MinBackoff
		default:
			if got > 0 {
				wait = c.cfg.MinBackoff
			}
			// Up to 20% jitter, so many viewers of one camera do not
			// reconnect in step.
			pause = wait + time.Duration(rand.Int64N(int64(wait)/5+1))
			if err == nil {
				err = errors.New("frames: camera stream ended")
			}
			c.emit(Event{Kind: EventReconnecting, Err: err, Wait: pause, Attempt: attempt})
			wait = min(2*wait, c.cfg.MaxBackoff)
		}
		t := time.NewTimer(pause)
		select {
		case <-ctx.Done():
			t.Stop()
			return ctx.Err()
		case <-t.C:
		}
	}
}

// fetch makes one request and reads its frames; got counts good frames,
// snapshot says the URL gave a single image.
func (c *Camera) fetch(ctx context.Context, attempt int) (got int, snapshot bool, err error) {
	cctx, cancel := context.WithCancel(ctx)
	defer cancel()
	req, err := http.NewRequestWithContext(cctx, http.MethodGet, c.cfg.URL, nil)
	if err != nil {
		return 0, false, fmt.Errorf("frames: camera request: %w", err)
	}
	req.Header.Set("Accept", "multipart/x-mixed-replace, image/jpeg, image/png")
	resp, err := c.client.Do(req)
	if err != nil {
		return 0, false, fmt.Errorf("frames: camera: %w", err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return 0, false, fmt.Errorf("frames: camera answered %s", resp.Status)
	}
	c.emit(Event{Kind: EventConnected, Attempt: attempt})
	body := newIdleReader(resp.Body, c.cfg.IdleTimeout, cancel)
	defer body.timer.Stop()
	name := resp.Request.URL.Redacted()
	ct := resp.Header.Get("Content-Type")
	mt, _, _ := mime.ParseMediaType(ct)
	switch {
	case strings.HasPrefix(mt, "multipart/"):
		boundary, err := BoundaryOf(ct)
		if err != nil {
			return 0, false, err
		}
		pr := NewPartReader(body, boundary, c.cfg.MaxPartBytes)
		for n := 0; ; n++ {
			part, err := pr.Next()
			if errors.Is(err, ErrPartTooLarge) {
				c.bad(fmt.Errorf("%s#part %d: %w (limit %d bytes)", name, n, err, c.cfg.MaxPartBytes), attempt)
				continue
			}
			if err != nil {
				if errors.Is(err, io.EOF) {
					return got, false, nil
				}
				if body.idle.Load() {
					err = fmt.Errorf("no data for %v", c.cfg.IdleTimeout)
				} else if errors.Is(err, io.ErrUnexpectedEOF) {
					c.bad(fmt.Errorf("%s#part %d: stream cut inside the part", name, n), attempt)
				}
				return got, false, fmt.Errorf("frames: camera stream: %w", err)
			}
			if err := c.offer(ctx, part.Body, fmt.Sprintf("%s#part %d", name, n), attempt); err != nil {
				return got, false, err
			}
			got++
		}
	case mt == "image/jpeg" || mt == "image/png" || mt == "application/octet-stream":
		data, err := io.ReadAll(io.LimitReader(body, int64(c.cfg.MaxPartBytes)+1))
		if err != nil {
			return 0, true, fmt.Errorf("frames: camera snapshot: %w", err)
		}
		if len(data) > c.cfg.MaxPartBytes {
			c.bad(fmt.Errorf("%s: %w (limit %d bytes)", name, ErrPartTooLarge, c.cfg.MaxPartBytes), attempt)
			return 0, true, nil
		}
		if err := c.offer(ctx, data, name, attempt); err != nil {
			return 0, true, err
		}
		return 1, true, nil
	}
	return 0, false, fmt.Errorf("frames: camera sent %q, want multipart/x-mixed-replace, image/jpeg or image/png", ct)
}

func (c *Camera) bad(err error, attempt int) {
	c.n.bad.Add(1)
	c.emit(Event{Kind: EventBadFrame, Err: err, Attempt: attempt})
}

// offer vets data and queues it; a bad frame is reported, not returned.
func (c *Camera) offer(ctx context.Context, data []byte, name string, attempt int) error {
	if err := c.cfg.Check(data, c.cfg.MaxPixels); err != nil {
		c.bad(fmt.Errorf("%s: %w", name, err), attempt)
		return nil
	}
	f := Frame{Seq: c.n.received.Load(), Name: name, Data: data, Format: formatOf(data), Arrived: time.Now()}
	return c.q.put(ctx, f)
}

// idleReader cancels the request when no byte arrives for a while, so a
// stalled camera counts as a drop instead of hanging the source.
type idleReader struct {
	r     io.Reader
	after time.Duration
	timer *time.Timer
	idle  atomic.Bool // the timer fired
}

func newIdleReader(r io.Reader, after time.Duration, cancel func()) *idleReader {
	ir := &idleReader{r: r, after: after}
	ir.timer = time.AfterFunc(after, func() { ir.idle.Store(true); cancel() })
	return ir
}

func (r *idleReader) Read(p []byte) (int, error) {
	n, err := r.r.Read(p)
	if n > 0 {
		r.timer.Reset(r.after)
	}
	return n, err
}

// CheckImage accepts a complete JPEG or PNG whose header parses and whose
// size is within maxPixels. A JPEG must end with the EOI marker (FF D9,
// ITU-T T.81 B.1.1.3; trailing padding allowed), a PNG with its IEND chunk
// (ISO 15948 11.2.5), which catches parts cut short in transit. Damage
// inside the entropy-coded data is found only by a full decode, which the
// consumer does.
func CheckImage(data []byte, maxPixels int64) error {
	var w, h int
	switch formatOf(data) {
	case "jpeg":
		end := bytes.TrimRight(data, "\x00\r\n \t")
		if len(end) < 4 || end[len(end)-2] != 0xFF || end[len(end)-1] != 0xD9 {
			return errors.New("frames: JPEG has no end-of-image marker (cut short or corrupt)")
		}
		cfg, err := jpeg.DecodeConfig(bytes.NewReader(data))
		if err != nil {
			return fmt.Errorf("frames: corrupt JPEG: %w", err)
		}
		w, h = cfg.Width, cfg.Height
	case "png":
		if !bytes.HasSuffix(data, []byte("IEND\xaeB`\x82")) {
			return errors.New("frames: PNG has no IEND chunk (cut short or corrupt)")
		}
		cfg, err := png.DecodeConfig(bytes.NewReader(data))
		if err != nil {
			return fmt.Errorf("frames: corrupt PNG: %w", err)
		}
		w, h = cfg.Width, cfg.Height
	default:
		return errors.New("frames: part is neither JPEG nor PNG")
	}
	if w <= 0 || h <= 0 || int64(w)*int64(h) > maxPixels {
		return fmt.Errorf("frames: image %d x %d is empty or over the %d-pixel limit", w, h, maxPixels)
	}
	return nil
}
