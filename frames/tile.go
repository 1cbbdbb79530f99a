package frames

import (
	"fmt"
	"math"
)

// Tiler maps a W x H frame to a grid of ceil(W/K) x ceil(H/K) streams, each
// the mean of the valid pixels of one K x K tile (edge tiles are smaller).
// A tile with no valid pixel is missing (NaN). With K = 1 a stream is a
// pixel. Stream i is tile (i mod GW, i / GW). A Tiler keeps scratch buffers:
// one goroutine uses it at a time.
type Tiler struct {
	W, H, K int
	GW, GH  int

	pix  []int32   // pixel indices to read, ascending
	slot []int32   // which requested stream each pixel belongs to
	vals []float32 // pixel values read
	cnt  []int32   // valid pixels per requested stream
}

// NewTiler returns the tiling of a w x h frame into k x k tiles.
func NewTiler(w, h, k int) (*Tiler, error) {
	if w <= 0 || h <= 0 {
		return nil, fmt.Errorf("frames: tiling an empty %dx%d frame", w, h)
	}
	if k < 1 || k > w && k > h {
		return nil, fmt.Errorf("frames: tile %d must be between 1 and the frame's larger side (%dx%d)", k, w, h)
	}
	return &Tiler{W: w, H: h, K: k, GW: (w + k - 1) / k, GH: (h + k - 1) / k}, nil
}

// Streams returns the number of streams, GW * GH.
func (t *Tiler) Streams() int { return t.GW * t.GH }

// Means writes every stream's value of f into dst[:Streams()].
func (t *Tiler) Means(f *Frame, dst []float32) {
	if f.Width != t.W || f.Height != t.H {
		panic(fmt.Sprintf("frames: Tiler for %dx%d given a %dx%d frame", t.W, t.H, f.Width, f.Height))
	}
	dst = dst[:t.Streams()]
	if t.K == 1 {
		for y := 0; y < t.H; y++ {
			copy(dst[y*t.W:(y+1)*t.W], f.Pix[y*f.Stride:y*f.Stride+t.W])
		}
		return
	}
	for i := range dst {
		dst[i] = t.tileMean(f, i)
	}
}

// tileMean averages the valid pixels of tile i of an in-memory frame.
func (t *Tiler) tileMean(f *Frame, i int) float32 {
	tx, ty := i%t.GW, i/t.GW
	x0, y0 := tx*t.K, ty*t.K
	x1, y1 := min(x0+t.K, t.W), min(y0+t.K, t.H)
	var sum float64
	n := 0
	for y := y0; y < y1; y++ {
		for _, v := range f.Pix[y*f.Stride+x0 : y*f.Stride+x1] {
			if v == v { // not NaN
				sum += float64(v)
				n++
			}
		}
	}
	if n == 0 {
		return float32(math.NaN())
	}
	return float32(sum / float64(n))
}

// Read reads the streams idx (ascending, as the engine hands them out)
// from src into dst and returns the bytes src took from storage. Only the
// pixels of those tiles are requested from src.
func (t *Tiler) Read(src PixelReader, idx []int32, dst []float32) (int64, error) {
	if len(dst) < len(idx) {
		panic("frames: Tiler.Read dst shorter than idx")
	}
	m := int32(t.Streams())
	for _, i := range idx {
		if i < 0 || i >= m {
			return 0, fmt.Errorf("frames: stream %d outside the %d streams", i, m)
		}
	}
	if f, ok := src.(*Frame); ok {
		if t.K == 1 {
			return f.ReadPixels(idx, dst)
		}
		for k, i := range idx {
			dst[k] = t.tileMean(f, int(i))
		}
		return 0, nil
	}
	if t.K == 1 {
		return src.ReadPixels(idx, dst)
	}
	t.expand(idx)
	if cap(t.vals) < len(t.pix) {
		t.vals = make([]float32, len(t.pix))
	}
	vals := t.vals[:len(t.pix)]
	n, err := src.ReadPixels(t.pix, vals)
	if err != nil {
		return n, err
	}
	if cap(t.cnt) < len(idx) {
		t.cnt = make([]int32, len(idx))
	}
	cnt := t.cnt[:len(idx)]
	for k := range idx {
		dst[k], cnt[k] = 0, 0
	}
	for p, v := range vals {
		if v == v {
			s := t.slot[p]
			dst[s] += v
			cnt[s]++
		}
	}
	nan := float32(math.NaN())
	for k := range idx {
		if cnt[k] == 0 {
			dst[k] = nan
		} else {
			dst[k] /= float32(cnt[k])
		}
	}
	return n, nil
}

// expand lists the pixels of tiles idx in ascending pixel order (row by
// row across each band of tiles), so a reader can merge runs.
func (t *Tiler) expand(idx []int32) {
	t.pix, t.slot = t.pix[:0], t.slot[:0]
	for a := 0; a < len(idx); {
		ty := int(idx[a]) / t.GW
		b := a
		for b < len(idx) && int(idx[b])/t.GW == ty {
			b++
		}
		y0, y1 := ty*t.K, min(ty*t.K+t.K, t.H)
		for y := y0; y < y1; y++ {
			for k := a; k < b; k++ {
				x0 := (int(idx[k]) % t.GW) * t.K
				x1 := min(x0+t.K, t.W)
				for x := x0; x < x1; x++ {
					t.pix = append(t.pix, int32(y*t.W+x))
					t.slot = append(t.slot, int32(k))
				}
			}
		}
		a = b
	}
}

// PixelsPerStream returns how many pixels the streams idx cover (what
// reading them costs in pixels).
func (t *Tiler) PixelsPerStream(idx []int32) int64 {
	if t.K == 1 {
		return int64(len(idx))
	}
	var n int64
	for _, i := range idx {
		tx, ty := int(i)%t.GW, int(i)/t.GW
		w := min(tx*t.K+t.K, t.W) - tx*t.K
		h := min(ty*t.K+t.K, t.H) - ty*t.K
		n += int64(w * h)
	}
	return n
}

// PixelBox maps an inclusive box of the stream grid to the inclusive box
// of pixels its tiles cover.
func (t *Tiler) PixelBox(x0, y0, x1, y1 int) [4]int {
	return [4]int{x0 * t.K, y0 * t.K, min(x1*t.K+t.K, t.W) - 1, min(y1*t.K+t.K, t.H) - 1}
}

// PixelPoint maps a point of the stream grid (tile units, tile centres at
// integers) to pixel coordinates (the tile's centre pixel).
func (t *Tiler) PixelPoint(cx, cy float64) (float64, float64) {
	h := float64(t.K-1) / 2
	px := math.Min(cx*float64(t.K)+h, float64(t.W-1))
	py := math.Min(cy*float64(t.K)+h, float64(t.H-1))
	return px, py
}
