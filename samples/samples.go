package samples

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"image"
	"image/png"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sort"
)

// Scenario is one invented frame sequence. Lookup returns a fresh copy, so a
// caller may change Frames (a shorter or longer run) or Seed (other noise)
// without affecting anyone else; the scene and its change stay the same.
type Scenario struct {
	Name        string
	Description string
	Width       int
	Height      int
	// Frames is the number of frames in the run.
	Frames int
	// ReferenceFrames is the suggested number of leading in-control frames
	// for learning the reference model. It is 150, not the usual 50: with
	// tens of thousands of pixels, the worst per-pixel level and scale
	// estimates from 50 frames are off enough to alarm soon after learning
	// (furnace, 3% budget, ARL0 10^4: a false alarm at frame 66 with 50
	// reference frames; the hot spot found at frame 260 with 150).
	ReferenceFrames int
	// Seed drives the per-frame noise only.
	Seed uint64

	m model
}

// Truth is the ground truth of a scenario, written as truth.json.
type Truth struct {
	Scenario        string `json:"scenario"`
	Width           int    `json:"width"`
	Height          int    `json:"height"`
	Frames          int    `json:"frames"`
	ReferenceFrames int    `json:"reference_frames"`
	Seed            uint64 `json:"seed"`
	// ChangeFrame is the first frame that carries the change.
	ChangeFrame int `json:"change_frame"`
	// EndFrame is the first frame after the change at which it is gone
	// again; -1 when the change lasts to the end of the run.
	EndFrame int `json:"end_frame"`
	// Centre is the change's centre in pixel coordinates (x, y).
	Centre [2]float64 `json:"centre"`
	// RadiusAt holds, for each frame, the change's radius in pixels by
	// RadiusRule; 0 where there is no change.
	RadiusAt   []float64 `json:"radius_at"`
	RadiusRule string    `json:"radius_rule"`
	// BBoxMax is the inclusive pixel box [x0,y0,x1,y1] of the change at its
	// largest radius over the run.
	BBoxMax [4]int `json:"bbox_max"`
	// NoiseSigmaAtCentre is the in-control noise standard deviation of the
	// centre pixel, in counts.
	NoiseSigmaAtCentre float64 `json:"noise_sigma_at_centre"`
	// PeakSigma is the largest added signal at the centre pixel, in units
	// of NoiseSigmaAtCentre.
	PeakSigma   float64 `json:"peak_sigma"`
	Description string  `json:"description"`
}

// model is the scene behind a scenario; one value is shared by all copies
// of a scenario and computes its static parts once.
type model interface {
	// background is the static noiseless signal, row-major, in counts.
	background() []float32
	// level maps background b at frame i to scale*b + offset (slow drift).
	level(i int) (scale, offset float32)
	// change returns the added signal at frame i, or nil when none.
	change(i int) *patch
	// noise returns the variance model: var = read2 + signal*perCount.
	noise() (read2, perCount float64)
	// truth fills the change-related fields for a run of frames.
	truth(frames int) Truth
}

// patch is a small box of added signal.
type patch struct {
	x0, y0, w, h int
	add          []float32 // row-major w*h
}

var registry = map[string]func() Scenario{
	"furnace":   newFurnace,
	"starfield": newStarfield,
}

// Names lists the scenario names in sorted order.
func Names() []string {
	names := make([]string, 0, len(registry))
	for n := range registry {
		names = append(names, n)
	}
	sort.Strings(names)
	return names
}

// Lookup returns the named scenario.
func Lookup(name string) (Scenario, error) {
	mk, ok := registry[name]
	if !ok {
		return Scenario{}, fmt.Errorf("samples: unknown scenario %q (have %v)", name, Names())
	}
	return mk(), nil
}

// Frame returns frame i as a new 16-bit grey image.
func (s Scenario) Frame(i int) (*image.Gray16, error) {
	dst := image.NewGray16(image.Rect(0, 0, s.Width, s.Height))
	if err := s.FrameInto(dst, i); err != nil {
		return nil, err
	}
	return dst, nil
}

// FrameInto writes frame i into dst, which must be Width x Height; it
// allocates only the change patch, so a server can reuse one buffer.
func (s Scenario) FrameInto(dst *image.Gray16, i int) error {
	if s.m == nil {
		return errors.New("samples: scenario not obtained from Lookup")
	}
	if i < 0 || i >= s.Frames {
		return fmt.Errorf("samples: %s: frame %d out of range [0,%d)", s.Name, i, s.Frames)
	}
	if dst == nil || dst.Rect.Dx() != s.Width || dst.Rect.Dy() != s.Height {
		return fmt.Errorf("samples: %s: destination must be %d x %d", s.Name, s.Width, s.Height)
	}
	bg := s.m.background()
	scale, offset := s.m.level(i)
	read2, perCount := s.m.noise()
	r2, pc := float32(read2), float32(perCount)
	ch := s.m.change(i)
	rng := rand.New(rand.NewPCG(mix64(s.Seed), mix64(s.Seed^frameStream(i))))
	for y := 0; y < s.Height; y++ {
		row := bg[y*s.Width : (y+1)*s.Width]
		out := dst.Pix[y*dst.Stride : y*dst.Stride+2*s.Width]
		inPatch := ch != nil && y >= ch.y0 && y < ch.y0+ch.h
		for x, b := range row {
			v := scale*b + offset
			if inPatch && x >= ch.x0 && x < ch.x0+ch.w {
				v += ch.add[(y-ch.y0)*ch.w+x-ch.x0]
			}
			variance := r2 + pc*max(v, 0)
			v += float32(math.Sqrt(float64(variance)) * rng.NormFloat64())
			q := math.Floor(float64(v) + 0.5)
			q = min(max(q, 0), 65535)
			u := uint16(q)
			out[2*x] = byte(u >> 8) // image.Gray16 is big-endian, as in PNG
			out[2*x+1] = byte(u)
		}
	}
	return nil
}

// frameStream derives the PCG seed of frame i; the constant keeps frame
// seeds apart from the layout seeds, which use small fixed numbers.
func frameStream(i int) uint64 { return 0x9e3779b97f4a7c15 ^ mix64(uint64(i)) }

// mix64 is the SplitMix64 finaliser (Steele, Lea & Flood 2014, OOPSLA), so
// neighbouring frame numbers give unrelated PCG states.
func mix64(z uint64) uint64 {
	z += 0x9e3779b97f4a7c15
	z = (z ^ z>>30) * 0xbf58476d1ce4e5b9
	z = (z ^ z>>27) * 0x94d049bb133111eb
	return z ^ z>>31
}

// Truth returns the ground truth for the scenario's current Frames and Seed.
func (s Scenario) Truth() Truth {
	t := s.m.truth(s.Frames)
	t.Scenario, t.Width, t.Height = s.Name, s.Width, s.Height
	t.Frames, t.ReferenceFrames, t.Seed = s.Frames, s.ReferenceFrames, s.Seed
	t.Description = s.Description
	return t
}

// FrameName is the file name of frame i as Write names it.
func FrameName(i int) string { return fmt.Sprintf("frame%05d.png", i) }

// Write writes every frame as a 16-bit grey PNG (frame00000.png, ...) and
// then truth.json into dir, creating dir if needed. progress, if not nil, is
// called after each frame.
func (s Scenario) Write(ctx context.Context, dir string, progress func(done, total int)) error {
	if s.m == nil {
		return errors.New("samples: scenario not obtained from Lookup")
	}
	if s.Frames < 1 {
		return fmt.Errorf("samples: %s: frames must be at least 1, got %d", s.Name, s.Frames)
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return fmt.Errorf("samples: %w", err)
	}
	// Noisy 16-bit data barely compress; the fastest level keeps writing
	// a few hundred frames to seconds.
	enc := png.Encoder{CompressionLevel: png.BestSpeed}
	img := image.NewGray16(image.Rect(0, 0, s.Width, s.Height))
	for i := 0; i < s.Frames; i++ {
		if err := ctx.Err(); err != nil {
			return fmt.Errorf("samples: writing %s stopped at frame %d: %w", s.Name, i, err)
		}
		if err := s.FrameInto(img, i); err != nil {
			return err
		}
		if err := writeFile(filepath.Join(dir, FrameName(i)), func(f *bufio.Writer) error {
			return enc.Encode(f, img)
		}); err != nil {
			return err
		}
		if progress != nil {
			progress(i+1, s.Frames)
		}
	}
	b, err := s.Truth().JSON()
	if err != nil {
		return err
	}
	return writeFile(filepath.Join(dir, "truth.json"), func(f *bufio.Writer) error {
		_, err := f.Write(b)
		return err
	})
}

// JSON renders the truth as truth.json: one top-level field a line, so the
// long radius_at list stays on one line.
func (t Truth) JSON() ([]byte, error) {
	radii := make([]float64, len(t.RadiusAt))
	for i, r := range t.RadiusAt {
		radii[i] = math.Round(r*1000) / 1000
	}
	t.RadiusAt = radii
	b, err := json.Marshal(t)
	if err != nil {
		return nil, fmt.Errorf("samples: truth: %w", err)
	}
	out := make([]byte, 0, len(b)+64)
	depth, inString, escaped := 0, false, false
	for _, c := range b {
		switch {
		case inString:
			switch {
			case escaped:
				escaped = false
			case c == '\\':
				escaped = true
			case c == '"':
				inString = false
			}
		case c == '"':
			inString = true
		case c == '{' || c == '[':
			depth++
		case c == '}' || c == ']':
			depth--
			if depth == 0 {
				out = append(out, '\n')
			}
		}
		out = append(out, c)
		if !inString && depth == 1 && (c == ',' || c == '{') {
			out = append(out, '\n', ' ', ' ')
		}
	}
	return append(out, '\n'), nil
}

func writeFile(path string, fill func(*bufio.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("samples: %w", err)
	}
	w := bufio.NewWriterSize(f, 1<<16)
	err = fill(w)
	if err == nil {
		err = w.Flush()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("samples: writing %s: %w", path, err)
	}
	return nil
}

// boxAround is the inclusive pixel box of a disc, clipped to the frame.
func boxAround(cx, cy, r float64, w, h int) [4]int {
	return [4]int{
		max(0, int(math.Floor(cx-r))), max(0, int(math.Floor(cy-r))),
		min(w-1, int(math.Ceil(cx+r))), min(h-1, int(math.Ceil(cy+r))),
	}
}
