package frames

import (
	"fmt"
	"io"
	"math/rand/v2"
)

// Synthetic describes an invented sequence for tests and benchmarks: a
// smooth level plus independent Gaussian noise per pixel and frame, and an
// optional disc that shifts by Delta from frame ChangeFrame on.
type Synthetic struct {
	Width, Height, Frames int
	Level, Gradient       float64 // mean is Level + Gradient * x / Width
	Noise                 float64 // noise standard deviation (native units)
	Seed                  uint64
	ChangeFrame           int     // first changed frame; < 0 or >= Frames: no change
	CX, CY, Radius        float64 // the changed disc
	Delta                 float64 // shift inside the disc
}

// syntheticSource yields Synthetic frames; frame i depends only on (Seed, i).
type syntheticSource struct {
	sp    Synthetic
	next  int
	frame Frame
}

// NewSynthetic returns a source of sp's frames.
func NewSynthetic(sp Synthetic) (Source, error) {
	if err := CheckSize(int64(sp.Width), int64(sp.Height), 0); err != nil {
		return nil, err
	}
	if sp.Frames < 0 {
		return nil, fmt.Errorf("frames: synthetic frames %d < 0", sp.Frames)
	}
	return &syntheticSource{sp: sp}, nil
}

func (s *syntheticSource) Len() int     { return s.sp.Frames }
func (s *syntheticSource) Close() error { return nil }

func (s *syntheticSource) Next() (Item, error) {
	if s.next >= s.sp.Frames {
		return Item{}, io.EOF
	}
	i := s.next
	s.next++
	s.sp.Render(i, &s.frame)
	return Item{Index: i, Name: fmt.Sprintf("synthetic#%d", i), Frame: &s.frame, Pixels: &s.frame}, nil
}

// Render draws frame i into dst.
func (sp Synthetic) Render(i int, dst *Frame) {
	dst.Reset(sp.Width, sp.Height)
	rng := rand.New(rand.NewPCG(sp.Seed, uint64(i)+1))
	changed := sp.ChangeFrame >= 0 && i >= sp.ChangeFrame
	r2 := sp.Radius * sp.Radius
	for y := 0; y < sp.Height; y++ {
		row := dst.Pix[y*dst.Stride : y*dst.Stride+sp.Width]
		dy := float64(y) - sp.CY
		for x := range row {
			v := sp.Level + sp.Gradient*float64(x)/float64(sp.Width) + sp.Noise*rng.NormFloat64()
			if changed {
				dx := float64(x) - sp.CX
				if dx*dx+dy*dy <= r2 {
					v += sp.Delta
				}
			}
			row[x] = float32(v)
		}
	}
}

// ChangedPixels returns the indices y*Width+x inside the changed disc.
func (sp Synthetic) ChangedPixels() []int32 {
	var out []int32
	for y := 0; y < sp.Height; y++ {
		for x := 0; x < sp.Width; x++ {
			dx, dy := float64(x)-sp.CX, float64(y)-sp.CY
			if dx*dx+dy*dy <= sp.Radius*sp.Radius {
				out = append(out, int32(y*sp.Width+x))
			}
		}
	}
	return out
}
