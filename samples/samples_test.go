package samples

import (
	"bytes"
	"compress/zlib"
	"context"
	"encoding/binary"
	"encoding/json"
	"hash/crc32"
	"image"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"testing"
)

func mustLookup(tb testing.TB, name string) Scenario {
	tb.Helper()
	s, err := Lookup(name)
	if err != nil {
		tb.Fatal(err)
	}
	return s
}

func mustFrame(tb testing.TB, s Scenario, i int) *image.Gray16 {
	tb.Helper()
	f, err := s.Frame(i)
	if err != nil {
		tb.Fatal(err)
	}
	return f
}

func TestNamesAndLookup(t *testing.T) {
	if got, want := Names(), []string{"furnace", "starfield"}; !slices.Equal(got, want) {
		t.Fatalf("Names() = %v, want %v", got, want)
	}
	if _, err := Lookup("volcano"); err == nil {
		t.Fatal("Lookup of an unknown name gave no error")
	}
	s := mustLookup(t, "furnace")
	for _, tc := range []struct {
		name string
		dst  *image.Gray16
		i    int
	}{
		{"ErrNegativeFrame", image.NewGray16(image.Rect(0, 0, s.Width, s.Height)), -1},
		{"ErrFramePastEnd", image.NewGray16(image.Rect(0, 0, s.Width, s.Height)), s.Frames},
		{"ErrWrongSize", image.NewGray16(image.Rect(0, 0, 10, 10)), 0},
		{"ErrNilDestination", nil, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if err := s.FrameInto(tc.dst, tc.i); err == nil {
				t.Fatal("no error")
			}
		})
	}
	if err := (Scenario{Frames: 1}).FrameInto(image.NewGray16(image.Rect(0, 0, 1, 1)), 0); err == nil {
		t.Fatal("a zero Scenario gave no error")
	}
}

// TestDeterministic writes the same short run twice and compares bytes;
// a different seed or frame must give different pixels.
func TestDeterministic(t *testing.T) {
	for _, name := range Names() {
		t.Run(name, func(t *testing.T) {
			s := mustLookup(t, name)
			s.Frames = 2
			a, b := t.TempDir(), t.TempDir()
			for _, dir := range []string{a, b} {
				if err := s.Write(context.Background(), dir, nil); err != nil {
					t.Fatal(err)
				}
			}
			for _, f := range []string{FrameName(0), FrameName(1), "truth.json"} {
				x, err := os.ReadFile(filepath.Join(a, f))
				if err != nil {
					t.Fatal(err)
				}
				y, err := os.ReadFile(filepath.Join(b, f))
				if err != nil {
					t.Fatal(err)
				}
				if !bytes.Equal(x, y) {
					t.Errorf("%s differs between two runs with seed %d", f, s.Seed)
				}
			}
			f0, f1 := mustFrame(t, s, 0), mustFrame(t, s, 1)
			if bytes.Equal(f0.Pix, f1.Pix) {
				t.Error("frames 0 and 1 are identical: no per-frame noise")
			}
			s.Seed++
			if bytes.Equal(f0.Pix, mustFrame(t, s, 0).Pix) {
				t.Error("another seed gave the same frame 0")
			}
		})
	}
}

// refStats returns per-pixel mean and standard deviation over frames
// [0, n) of the scenario.
func refStats(tb testing.TB, s Scenario, n int) (mean, sd []float64) {
	tb.Helper()
	m := s.Width * s.Height
	sum, sum2 := make([]float64, m), make([]float64, m)
	img := image.NewGray16(image.Rect(0, 0, s.Width, s.Height))
	for i := 0; i < n; i++ {
		if err := s.FrameInto(img, i); err != nil {
			tb.Fatal(err)
		}
		for p := range m {
			v := float64(binary.BigEndian.Uint16(img.Pix[2*p:]))
			sum[p] += v
			sum2[p] += v * v
		}
	}
	mean, sd = make([]float64, m), make([]float64, m)
	for p := range m {
		mean[p] = sum[p] / float64(n)
		sd[p] = math.Sqrt(max(0, (sum2[p]-float64(n)*mean[p]*mean[p])/float64(n-1)))
	}
	return mean, sd
}

// regionScore is sum of z over the disc of radius r at (cx, cy), divided by
// sqrt(n): about N(0,1) in control, about mean shift * sqrt(n) after.
func regionScore(img *image.Gray16, mean, sd []float64, cx, cy, r float64) float64 {
	w := img.Rect.Dx()
	var sum float64
	var n int
	for y := int(cy - r); y <= int(cy+r); y++ {
		for x := int(cx - r); x <= int(cx+r); x++ {
			if math.Hypot(float64(x)-cx, float64(y)-cy) > r {
				continue
			}
			p := y*w + x
			v := float64(binary.BigEndian.Uint16(img.Pix[2*p:]))
			sum += (v - mean[p]) / max(sd[p], 0.5)
			n++
		}
	}
	return sum / math.Sqrt(float64(n))
}

// TestChangeWhereTruthSays checks the planted change against truth.json's
// numbers: the region's standardised sum exceeds k = 4 after the change
// frame and stays below it before (and after the end frame, and in a
// control region). In control the score is close to N(0,1), so |score| > 4
// has probability about 6e-5 per check.
func TestChangeWhereTruthSays(t *testing.T) {
	const k = 4
	for _, tc := range []struct {
		name    string
		radius  float64 // disc used for the score
		after   []int   // frame offsets from the change frame that must score > k
		control [2]float64
	}{
		{"furnace", 3, []int{0, 1, 2, 60, 150}, [2]float64{80, 160}},
		{"starfield", 2, []int{20, 30, 39}, [2]float64{120, 400}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := mustLookup(t, tc.name)
			tr := s.Truth()
			mean, sd := refStats(t, s, 20)
			cx, cy := tr.Centre[0], tr.Centre[1]
			for _, i := range []int{tr.ChangeFrame - 3, tr.ChangeFrame - 1} {
				if z := regionScore(mustFrame(t, s, i), mean, sd, cx, cy, tc.radius); math.Abs(z) >= k {
					t.Errorf("frame %d before the change: region score %.2f", i, z)
				}
			}
			for _, d := range tc.after {
				i := tr.ChangeFrame + d
				img := mustFrame(t, s, i)
				z := regionScore(img, mean, sd, cx, cy, tc.radius)
				t.Logf("frame %d: region score %.2f", i, z)
				if z <= k {
					t.Errorf("frame %d after the change: region score %.2f, want > %d", i, z, k)
				}
				if z := regionScore(img, mean, sd, tc.control[0], tc.control[1], tc.radius); math.Abs(z) >= k {
					t.Errorf("frame %d: control region score %.2f", i, z)
				}
				if tr.RadiusAt[i] <= 0 {
					t.Errorf("truth radius_at[%d] = %v while the change is on", i, tr.RadiusAt[i])
				}
			}
			if tr.EndFrame >= 0 {
				for _, i := range []int{tr.EndFrame, tr.EndFrame + 20} {
					if z := regionScore(mustFrame(t, s, i), mean, sd, cx, cy, tc.radius); math.Abs(z) >= k {
						t.Errorf("frame %d after the end: region score %.2f", i, z)
					}
					if tr.RadiusAt[i] != 0 {
						t.Errorf("truth radius_at[%d] = %v after the end frame", i, tr.RadiusAt[i])
					}
				}
			}
			if tr.RadiusAt[tr.ChangeFrame-1] != 0 {
				t.Errorf("truth radius_at before the change is %v", tr.RadiusAt[tr.ChangeFrame-1])
			}
			b := tr.BBoxMax
			if cx < float64(b[0]) || cx > float64(b[2]) || cy < float64(b[1]) || cy > float64(b[3]) {
				t.Errorf("bbox_max %v does not contain the centre %v", b, tr.Centre)
			}
			// The stated noise sigma at the centre must match the measured one
			// (20 frames: sd of the estimate about 16%).
			p := int(cy)*s.Width + int(cx)
			if r := sd[p] / tr.NoiseSigmaAtCentre; r < 0.6 || r > 1.4 {
				t.Errorf("measured sigma at centre %.1f, truth says %.1f", sd[p], tr.NoiseSigmaAtCentre)
			}
		})
	}
}

// TestNoiseGrowsWithSignal fits temporal variance against mean over all
// pixels (none may come near the 16-bit ceiling). The design is the photon-transfer relation of a
// shot-noise-limited sensor, var = read^2 + mean/K (Janesick, "Photon
// Transfer", SPIE 2007, from memory): the slope must be 1/K.
func TestNoiseGrowsWithSignal(t *testing.T) {
	for _, tc := range []struct {
		name      string
		slope     float64
		read2     float64
		minSpread float64 // the scene must span at least this range of means
	}{
		{"furnace", furnacePerCt, furnaceRead * furnaceRead, 5000},
		{"starfield", starPerCt, starRead * starRead, 5000},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := mustLookup(t, tc.name)
			const n = 24
			mean, sd := refStats(t, s, n)
			// Least-squares line var = a + b*mean.
			var sx, sy, sxx, sxy, cnt, lo, hi float64
			lo = math.Inf(1)
			for p := range mean {
				if mean[p] > 60000 { // clipped pixels have no noise
					t.Errorf("pixel %d: mean %.0f is close to the 16-bit ceiling", p, mean[p])
					continue
				}
				x, y := mean[p], sd[p]*sd[p]
				sx += x
				sy += y
				sxx += x * x
				sxy += x * y
				cnt++
				lo, hi = min(lo, x), max(hi, x)
			}
			b := (cnt*sxy - sx*sy) / (cnt*sxx - sx*sx)
			a := (sy - b*sx) / cnt
			t.Logf("var = %.1f + %.4f * mean over %.0f pixels, means %.0f..%.0f", a, b, cnt, lo, hi)
			if hi-lo < tc.minSpread {
				t.Fatalf("means span only %.0f counts", hi-lo)
			}
			if math.Abs(b-tc.slope) > 0.05*tc.slope {
				t.Errorf("slope %.4f, designed %.4f (tolerance 5%%)", b, tc.slope)
			}
			// The intercept is an extrapolation; check the predicted variance
			// at the lowest mean instead (within 10%).
			want := tc.read2 + tc.slope*lo
			if got := a + b*lo; math.Abs(got-want) > 0.1*want {
				t.Errorf("variance at mean %.0f: fit %.1f, designed %.1f", lo, got, want)
			}
		})
	}
}

// TestPNG16RoundTrip reads a written frame twice: once by hand per the PNG
// specification (W3C PNG, 2nd edition / ISO 15948: signature 5.2, chunk CRC
// 5.5, IHDR 11.2.2, filters 9.2; 16-bit samples are big-endian, 7.1), once
// with image/png, and compares both with the generated pixels.
func TestPNG16RoundTrip(t *testing.T) {
	s := mustLookup(t, "furnace")
	s.Frames = 1
	dir := t.TempDir()
	if err := s.Write(context.Background(), dir, nil); err != nil {
		t.Fatal(err)
	}
	raw, err := os.ReadFile(filepath.Join(dir, FrameName(0)))
	if err != nil {
		t.Fatal(err)
	}
	want := mustFrame(t, s, 0)

	if !bytes.HasPrefix(raw, []byte{137, 80, 78, 71, 13, 10, 26, 10}) {
		t.Fatal("missing PNG signature")
	}
	var idat []byte
	var w, h int
	for b := raw[8:]; len(b) > 0; {
		if len(b) < 12 {
			t.Fatal("truncated chunk")
		}
		n := int(binary.BigEndian.Uint32(b))
		typ, data := string(b[4:8]), b[8:8+n]
		if got := binary.BigEndian.Uint32(b[8+n:]); got != crc32.ChecksumIEEE(b[4:8+n]) {
			t.Fatalf("chunk %s: bad CRC", typ)
		}
		switch typ {
		case "IHDR":
			w, h = int(binary.BigEndian.Uint32(data)), int(binary.BigEndian.Uint32(data[4:]))
			if depth, colour := data[8], data[9]; depth != 16 || colour != 0 {
				t.Fatalf("IHDR bit depth %d colour type %d, want 16 and 0 (greyscale)", depth, colour)
			}
		case "IDAT":
			idat = append(idat, data...)
		}
		b = b[12+n:]
	}
	if w != s.Width || h != s.Height {
		t.Fatalf("IHDR size %dx%d", w, h)
	}
	zr, err := zlib.NewReader(bytes.NewReader(idat))
	if err != nil {
		t.Fatal(err)
	}
	data, err := io.ReadAll(zr)
	if err != nil {
		t.Fatal(err)
	}
	const bpp = 2 // bytes per complete pixel, 16-bit grey
	rowLen := w * bpp
	if len(data) != h*(rowLen+1) {
		t.Fatalf("inflated %d bytes, want %d", len(data), h*(rowLen+1))
	}
	prev := make([]byte, rowLen)
	got := make([]byte, 0, h*rowLen)
	for y := 0; y < h; y++ {
		ft, cur := data[y*(rowLen+1)], slices.Clone(data[y*(rowLen+1)+1:(y+1)*(rowLen+1)])
		for i := range cur {
			var a, b, c byte
			if i >= bpp {
				a, c = cur[i-bpp], prev[i-bpp]
			}
			b = prev[i]
			switch ft {
			case 0:
			case 1:
				cur[i] += a
			case 2:
				cur[i] += b
			case 3:
				cur[i] += byte((int(a) + int(b)) / 2)
			case 4:
				cur[i] += paeth(a, b, c)
			default:
				t.Fatalf("row %d: filter type %d", y, ft)
			}
		}
		got = append(got, cur...)
		prev = cur
	}
	if !bytes.Equal(got, want.Pix) {
		t.Error("hand-decoded samples differ from the generated frame")
	}

	img, err := png.Decode(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	g, ok := img.(*image.Gray16)
	if !ok {
		t.Fatalf("image/png decoded a %T, want *image.Gray16", img)
	}
	for _, pt := range []image.Point{{0, 0}, {214, 92}, {319, 239}} {
		if g.Gray16At(pt.X, pt.Y) != want.Gray16At(pt.X, pt.Y) {
			t.Errorf("pixel %v: %v, want %v", pt, g.Gray16At(pt.X, pt.Y), want.Gray16At(pt.X, pt.Y))
		}
	}
	if !bytes.Equal(g.Pix, want.Pix) {
		t.Error("image/png samples differ from the generated frame")
	}
}

// paeth is the PNG Paeth predictor (PNG specification 9.4).
func paeth(a, b, c byte) byte {
	p := int(a) + int(b) - int(c)
	pa, pb, pc := abs(p-int(a)), abs(p-int(b)), abs(p-int(c))
	switch {
	case pa <= pb && pa <= pc:
		return a
	case pb <= pc:
		return b
	}
	return c
}

func abs(x int) int {
	if x < 0 {
		return -x
	}
	return x
}

func TestTruthJSON(t *testing.T) {
	s := mustLookup(t, "starfield")
	s.Frames = 1
	dir := t.TempDir()
	var calls int
	if err := s.Write(context.Background(), dir, func(done, total int) { calls++ }); err != nil {
		t.Fatal(err)
	}
	if calls != 1 {
		t.Errorf("progress called %d times, want 1", calls)
	}
	b, err := os.ReadFile(filepath.Join(dir, "truth.json"))
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"scenario", "width", "height", "frames", "reference_frames", "change_frame",
		"end_frame", "centre", "radius_at", "bbox_max", "noise_sigma_at_centre", "description"} {
		if _, ok := m[k]; !ok {
			t.Errorf("truth.json lacks %q", k)
		}
	}
	var tr Truth
	if err := json.Unmarshal(b, &tr); err != nil {
		t.Fatal(err)
	}
	if tr.Frames != 1 || len(tr.RadiusAt) != 1 || tr.ChangeFrame != starChange || tr.Width != 512 {
		t.Errorf("truth.json = %+v", tr)
	}
}

// TestTruthJSONEscapes checks that the line-per-field layout keeps strings
// with quotes, backslashes, commas and braces intact.
func TestTruthJSONEscapes(t *testing.T) {
	in := Truth{Description: `a "hot, {odd}" spot \ here\`, RadiusAt: []float64{1.23456, 0}}
	b, err := in.JSON()
	if err != nil {
		t.Fatal(err)
	}
	var out Truth
	if err := json.Unmarshal(b, &out); err != nil {
		t.Fatalf("%v in %s", err, b)
	}
	if out.Description != in.Description || !slices.Equal(out.RadiusAt, []float64{1.235, 0}) {
		t.Errorf("round trip gave %q %v", out.Description, out.RadiusAt)
	}
	if in.RadiusAt[0] != 1.23456 {
		t.Error("JSON changed the caller's radius_at")
	}
}

func TestWriteStopsOnCancel(t *testing.T) {
	s := mustLookup(t, "furnace")
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	dir := t.TempDir()
	if err := s.Write(ctx, dir, nil); err == nil {
		t.Fatal("cancelled Write gave no error")
	}
	if _, err := os.Stat(filepath.Join(dir, FrameName(0))); err == nil {
		t.Error("cancelled Write still wrote a frame")
	}
}

func BenchmarkFrameInto(b *testing.B) {
	for _, name := range Names() {
		b.Run(name, func(b *testing.B) {
			s := mustLookup(b, name)
			img := image.NewGray16(image.Rect(0, 0, s.Width, s.Height))
			_ = s.FrameInto(img, 0)
			b.ResetTimer()
			for i := 0; b.Loop(); i++ {
				if err := s.FrameInto(img, 200+i%100); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
