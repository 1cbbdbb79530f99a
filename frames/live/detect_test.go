package live

import (
	"context"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"sparsewatch/frames"
	"sparsewatch/monitor"
	"sparsewatch/samples"
)

// The end-to-end runs watch the furnace scenario on 4 x 4 tile means with a
// 3% budget and a limit calibrated for ARL0 = 10^4 frames.
const (
	e2eTile = 4
	// The scenario's suggested 150 reference frames (checked below): the
	// limit is calibrated for exactly standard-normal z, and with 50 frames
	// the per-tile mean and scale errors alone (z variance up to 2.6 over
	// 4800 tiles, measured) bring false alarms within 100 frames.
	e2eRef = 150
)

var e2eCal struct {
	once sync.Once
	cfg  monitor.Config
	cal  monitor.Calibration
	err  error
}

// e2eConfig calibrates once for both end-to-end tests.
func e2eConfig(tb testing.TB, gw, gh int) (monitor.Config, monitor.Calibration) {
	tb.Helper()
	e2eCal.once.Do(func() {
		m := gw * gh
		cfg := monitor.Config{Width: gw, Height: gh, Budget: m * 3 / 100, TopR: 4, FirstFrame: e2eRef}.Defaults()
		cal, err := monitor.Calibrate(context.Background(), monitor.CalibrationSpec{
			Config: cfg, TargetARL0: 1e4, Paths: 24, Verify: 1, WorkCap: 6e7, Seed: 3})
		cfg.Limit = cal.Limit
		e2eCal.cfg, e2eCal.cal, e2eCal.err = cfg, cal, err
	})
	if e2eCal.err != nil {
		tb.Fatal(e2eCal.err)
	}
	return e2eCal.cfg, e2eCal.cal
}

func skipLong(t *testing.T) {
	if testing.Short() || raceEnabled {
		t.Skip("end-to-end detection takes about 10 s of CPU; skipped with -short and -race")
	}
}

// detect decodes frames from next until the first alarm or the last frame,
// and checks the alarm against the scenario's truth: after the change, and
// its first region holding the truth centre's tile.
func detect(t *testing.T, s samples.Scenario, last int, next func() (Frame, bool)) {
	t.Helper()
	tr := s.Truth()
	if s.ReferenceFrames != e2eRef {
		t.Errorf("scenario suggests %d reference frames, the test learns from %d", s.ReferenceFrames, e2eRef)
	}
	tiler, err := frames.NewTiler(s.Width, s.Height, e2eTile)
	if err != nil {
		t.Fatal(err)
	}
	m := tiler.Streams()
	// Tile means are not integers and their noise can be below the default
	// half-level floor (about 0.4 grey levels for the 8-bit JPEGs).
	learner, err := monitor.NewLearner(m, e2eRef, monitor.ModelOptions{Kind: monitor.MeanSD, ScaleFloor: 0.05})
	if err != nil {
		t.Fatal(err)
	}
	cfg, cal := e2eConfig(t, tiler.GW, tiler.GH)
	eng, err := monitor.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	var model *monitor.Model
	frame := &frames.Frame{}
	means := make([]float32, m)
	z := make([]float32, 0, m)
	missing := make([]bool, 0, m)
	raw := make([]float32, 0, m)
	alarm := -1
	var region monitor.Region
	for i := 0; i < last && alarm < 0; i++ {
		f, ok := next()
		if !ok {
			t.Fatalf("frame %d did not arrive", i)
		}
		if _, err := frames.Decode(f.Data, 0, frame); err != nil {
			t.Fatalf("frame %d (%s): %v", i, f.Name, err)
		}
		tiler.Means(frame, means)
		if i < e2eRef {
			if err := learner.Add(means); err != nil {
				t.Fatal(err)
			}
			if i == e2eRef-1 {
				if model, err = learner.Model(); err != nil {
					t.Fatal(err)
				}
			}
			continue
		}
		idx := eng.Next()
		z, missing, raw = z[:len(idx)], missing[:len(idx)], raw[:len(idx)]
		for j, p := range idx {
			raw[j] = means[p]
		}
		model.Standardize(z, missing, idx, raw)
		u, err := eng.Step(z, missing)
		if err != nil {
			t.Fatal(err)
		}
		if u.Started != nil {
			alarm = u.Started.Frame
			if len(u.Started.Regions) > 0 {
				region = u.Started.Regions[0]
			}
		}
	}
	t.Logf("limit %.2f (%s); first alarm at frame %d, change at %d; region tiles [%d,%d]-[%d,%d]",
		cal.Limit, cal.Note, alarm, tr.ChangeFrame, region.X0, region.Y0, region.X1, region.Y1)
	if alarm < tr.ChangeFrame {
		t.Fatalf("first alarm at frame %d, before the change at %d (or none)", alarm, tr.ChangeFrame)
	}
	cx, cy := int(tr.Centre[0])/e2eTile, int(tr.Centre[1])/e2eTile
	if cx < region.X0 || cx > region.X1 || cy < region.Y0 || cy > region.Y1 {
		t.Errorf("region tiles [%d,%d]-[%d,%d] miss the centre tile (%d,%d)", region.X0, region.Y0, region.X1, region.Y1, cx, cy)
	}
}

// TestMJPEGFeedDetectsChange serves the furnace scenario as 8-bit JPEG parts
// of an MJPEG stream on 127.0.0.1 and watches it through a Camera.
func TestMJPEGFeedDetectsChange(t *testing.T) {
	skipLong(t)
	s, err := samples.Lookup("furnace")
	if err != nil {
		t.Fatal(err)
	}
	last := s.Truth().ChangeFrame + 80
	parts := demoJPEGs(t, 0, last)
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+testBoundary)
		for _, p := range parts {
			if writePart(w, p) != nil {
				return
			}
		}
		<-r.Context().Done()
	}))
	defer srv.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	e2eConfig(t, (s.Width+e2eTile-1)/e2eTile, (s.Height+e2eTile-1)/e2eTile) // calibrate before the feed starts
	// A queue as long as the clip: this test is about detection, not drops.
	c := mustCamera(t, CameraConfig{URL: srv.URL + "/", Allow: mustAllow(t, srv.URL+"/"), Queue: len(parts)})
	go c.Run(ctx)
	detect(t, s, last, func() (Frame, bool) {
		select {
		case f := <-c.Frames():
			return f, true
		case <-ctx.Done():
			return Frame{}, false
		}
	})
	if n := c.Counts(); n.Dropped != 0 || n.Bad != 0 {
		t.Errorf("counts %+v", n)
	}
}

// TestFolderFeedDetectsChange writes the furnace scenario's 16-bit PNG
// frames into a watched folder one by one while the Folder polls it.
func TestFolderFeedDetectsChange(t *testing.T) {
	skipLong(t)
	s, err := samples.Lookup("furnace")
	if err != nil {
		t.Fatal(err)
	}
	last := s.Truth().ChangeFrame + 80
	s.Frames = last
	src := t.TempDir()
	if err := s.Write(context.Background(), src, nil); err != nil {
		t.Fatal(err)
	}
	root := t.TempDir()
	dir := filepath.Join(root, "incoming")
	if err := os.Mkdir(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	e2eConfig(t, (s.Width+e2eTile-1)/e2eTile, (s.Height+e2eTile-1)/e2eTile)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	f := mustFolder(t, FolderConfig{Root: root, Dir: "incoming", Interval: 2 * time.Millisecond})
	go f.Run(ctx)
	// The writer renames finished files in, as frame grabbers do.
	go func() {
		for i := 0; i < last && ctx.Err() == nil; i++ {
			name := samples.FrameName(i)
			if err := os.Rename(filepath.Join(src, name), filepath.Join(dir, name)); err != nil {
				t.Error(err)
				return
			}
			time.Sleep(time.Millisecond)
		}
	}()
	n := 0
	detect(t, s, last, func() (Frame, bool) {
		select {
		case fr := <-f.Frames():
			if want := samples.FrameName(n); fr.Name != want {
				t.Errorf("frame %d is %s, want %s", n, fr.Name, want)
			}
			n++
			return fr, true
		case <-ctx.Done():
			return Frame{}, false
		}
	})
}
