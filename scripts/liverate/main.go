// Command liverate measures a live session end to end: it starts a
// sparsewatch server on a free port, makes a browser-camera session, sends
// JPEG frames over the owner's websocket at a fixed rate as a page's camera
// would, and prints frames in, frames monitored per second, drops and the
// server's latency from arrival to update. Run it through scripts/live-rate.
package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"io"
	"log/slog"
	"math/rand/v2"
	"net"
	"net/http"
	"os"
	"os/exec"
	"strings"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/gorilla/websocket"
)

type options struct {
	bin           string
	duration      time.Duration
	width, height int
	fps           float64
	budget        string
	reference     int
	limit         float64
	maxInFlight   int
	quality       int
}

// liveStatus is the part of GET /api/sessions/{id} read here.
type liveStatus struct {
	State string `json:"state"`
	Live  *struct {
		FramesIn        uint64  `json:"frames_in"`
		FramesMonitored uint64  `json:"frames_monitored"`
		Dropped         uint64  `json:"dropped"`
		FPSIn           float64 `json:"fps_in"`
		FPSMonitored    float64 `json:"fps_monitored"`
		LatencyMedian   float64 `json:"latency_ms_median"`
		LatencyP95      float64 `json:"latency_ms_p95"`
	} `json:"live"`
}

func main() {
	var o options
	flag.StringVar(&o.bin, "bin", "", "sparsewatch binary to start (scripts/live-rate builds one)")
	flag.DurationVar(&o.duration, "duration", 60*time.Second, "how long to measure after the reference is learnt (a number alone is seconds)")
	flag.IntVar(&o.width, "width", 640, "frame width")
	flag.IntVar(&o.height, "height", 480, "frame height")
	flag.Float64Var(&o.fps, "fps", 30, "frames sent per second")
	flag.StringVar(&o.budget, "budget", "3%", "pixels read per frame")
	flag.IntVar(&o.reference, "reference", 30, "reference frames")
	flag.Float64Var(&o.limit, "limit", 60, "fixed control limit (no calibration wait)")
	flag.IntVar(&o.maxInFlight, "max-in-flight", 0, "hold a frame back while this many are unanswered, as the page does with 2 (0 = always send)")
	flag.IntVar(&o.quality, "quality", 85, "JPEG quality of the frames")
	flag.Parse()
	log := slog.New(slog.NewTextHandler(os.Stderr, nil))
	if err := run(o, log); err != nil {
		log.Error("live rate", "err", err)
		os.Exit(1)
	}
}

func run(o options, log *slog.Logger) error {
	if o.bin == "" {
		return errors.New("-bin is required (the sparsewatch binary to start)")
	}
	pool, err := framePool(o, 16)
	if err != nil {
		return err
	}
	base, stop, err := startServer(o.bin, log)
	if err != nil {
		return err
	}
	defer stop()
	id, tok, err := createSession(base, o)
	if err != nil {
		return err
	}
	ws, _, err := websocket.DefaultDialer.Dial("ws"+strings.TrimPrefix(base, "http")+"/ws/sessions/"+id+"?token="+tok, nil)
	if err != nil {
		return fmt.Errorf("websocket: %w", err)
	}
	defer ws.Close()
	var answered atomic.Int64
	go func() { // count the server's "camera" answers, drop the rest
		for {
			kind, msg, err := ws.ReadMessage()
			if err != nil {
				return
			}
			if kind == websocket.TextMessage && bytes.Contains(msg, []byte(`"type":"camera"`)) {
				answered.Add(1)
			}
		}
	}()

	var sent, held int64
	tick := time.NewTicker(time.Duration(float64(time.Second) / o.fps))
	defer tick.Stop()
	send := func() error {
		if o.maxInFlight > 0 && sent-answered.Load() >= int64(o.maxInFlight) {
			held++
			return nil
		}
		if err := ws.WriteMessage(websocket.BinaryMessage, pool[sent%int64(len(pool))]); err != nil {
			return fmt.Errorf("send frame %d: %w", sent, err)
		}
		sent++
		return nil
	}
	// Learn the reference first; the measurement starts once frames are watched.
	warm := time.Now().Add(60 * time.Second)
	var first liveStatus
	for {
		<-tick.C
		if err := send(); err != nil {
			return err
		}
		if sent%int64(max(1, int(o.fps/4))) != 0 {
			continue
		}
		if first, err = status(base, id, tok); err != nil {
			return err
		}
		if first.Live != nil && first.Live.FramesMonitored > 0 {
			break
		}
		if time.Now().After(warm) {
			return fmt.Errorf("no frame watched after 60 s (state %s)", first.State)
		}
	}
	sent0, held0, t0 := sent, held, time.Now()
	for end := t0.Add(o.duration); time.Now().Before(end); {
		<-tick.C
		if err := send(); err != nil {
			return err
		}
	}
	secs := time.Since(t0).Seconds()
	time.Sleep(200 * time.Millisecond) // let the last frames reach the server
	last, err := status(base, id, tok)
	if err != nil {
		return err
	}
	a, b := first.Live, last.Live
	in, mon, drop := b.FramesIn-a.FramesIn, b.FramesMonitored-a.FramesMonitored, b.Dropped-a.Dropped
	fmt.Printf("live rate: %d x %d JPEG (%d KB each) at %g frames/s, budget %s, browser-camera session, %.1f s measured\n",
		o.width, o.height, len(pool[0])/1024, o.fps, o.budget, secs)
	fmt.Printf("  sent              %d (%.1f/s)", sent-sent0, float64(sent-sent0)/secs)
	if o.maxInFlight > 0 {
		fmt.Printf(", held back by the sender %d (at most %d unanswered)", held-held0, o.maxInFlight)
	}
	fmt.Println()
	fmt.Printf("  frames in         %d (%.1f/s)\n", in, float64(in)/secs)
	fmt.Printf("  frames monitored  %d (%.1f/s)\n", mon, float64(mon)/secs)
	fmt.Printf("  dropped           %d (%.1f%% of frames in)\n", drop, 100*float64(drop)/float64(max(in, 1)))
	fmt.Printf("  latency, arrival to update: median %.1f ms, 95th percentile %.1f ms (server, last %d frames)\n",
		b.LatencyMedian, b.LatencyP95, min(mon, 512))
	return nil
}

// framePool encodes n noisy colour frames as JPEG, as a page's canvas does.
func framePool(o options, n int) ([][]byte, error) {
	rng := rand.New(rand.NewPCG(1, 2))
	var pool [][]byte
	for range n {
		img := image.NewRGBA(image.Rect(0, 0, o.width, o.height))
		for y := range o.height {
			for x := range o.width {
				v := 90 + 60*float64(x)/float64(o.width) + rng.NormFloat64()*6
				g := uint8(max(0, min(255, v)))
				img.SetRGBA(x, y, color.RGBA{g, g, uint8(max(0, min(255, v-20))), 255})
			}
		}
		var b bytes.Buffer
		if err := jpeg.Encode(&b, img, &jpeg.Options{Quality: o.quality}); err != nil {
			return nil, fmt.Errorf("encode frame: %w", err)
		}
		pool = append(pool, b.Bytes())
	}
	return pool, nil
}

// startServer runs bin serve on a free 127.0.0.1 port with a fresh data
// folder and waits until it answers; stop ends it (SIGINT, then kill).
func startServer(bin string, log *slog.Logger) (string, func(), error) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return "", nil, fmt.Errorf("free port: %w", err)
	}
	addr := ln.Addr().String()
	ln.Close()
	data, err := os.MkdirTemp("", "liverate-*")
	if err != nil {
		return "", nil, fmt.Errorf("data folder: %w", err)
	}
	cmd := exec.Command(bin, "serve", "--addr", addr, "--data", data)
	cmd.Stdout, cmd.Stderr = io.Discard, os.Stderr
	if err := cmd.Start(); err != nil {
		os.RemoveAll(data)
		return "", nil, fmt.Errorf("start %s: %w", bin, err)
	}
	stop := func() {
		cmd.Process.Signal(syscall.SIGINT)
		done := make(chan struct{})
		go func() { cmd.Wait(); close(done) }()
		select {
		case <-done:
		case <-time.After(10 * time.Second):
			cmd.Process.Kill()
			<-done
		}
		os.RemoveAll(data)
	}
	base := "http://" + addr
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	for {
		res, err := http.Get(base + "/api/demos")
		if err == nil {
			res.Body.Close()
			log.Info("server up", "addr", addr, "pid", cmd.Process.Pid)
			return base, stop, nil
		}
		select {
		case <-ctx.Done():
			stop()
			return "", nil, fmt.Errorf("server at %s did not answer: %w", addr, err)
		case <-time.After(100 * time.Millisecond):
		}
	}
}

func createSession(base string, o options) (id, tok string, err error) {
	params, _ := json.Marshal(map[string]any{"budget": o.budget, "reference_frames": o.reference, "limit": o.limit})
	body := `{"source":{"kind":"browser-camera"},"name":"live rate","params":` + string(params) + `}`
	res, err := http.Post(base+"/api/sessions", "application/json", strings.NewReader(body))
	if err != nil {
		return "", "", fmt.Errorf("create session: %w", err)
	}
	defer res.Body.Close()
	b, _ := io.ReadAll(res.Body)
	var cr struct {
		ID    string `json:"id"`
		Owner string `json:"owner_token"`
	}
	if res.StatusCode != http.StatusCreated || json.Unmarshal(b, &cr) != nil {
		return "", "", fmt.Errorf("create session: %d %s", res.StatusCode, b)
	}
	return cr.ID, cr.Owner, nil
}

func status(base, id, tok string) (liveStatus, error) {
	var st liveStatus
	req, _ := http.NewRequest("GET", base+"/api/sessions/"+id, nil)
	req.Header.Set("Authorization", "Bearer "+tok)
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		return st, fmt.Errorf("status: %w", err)
	}
	defer res.Body.Close()
	if err := json.NewDecoder(res.Body).Decode(&st); err != nil {
		return st, fmt.Errorf("status: %w", err)
	}
	if st.Live == nil {
		return st, fmt.Errorf("status of session %s has no live part", id)
	}
	return st, nil
}
