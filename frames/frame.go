package frames

import (
	"fmt"
	"math"
	"strings"
)

// Frame is one image as float32 values in native units. Pixel (x, y) is
// Pix[y*Stride+x]; NaN marks a missing pixel (never read, never zero).
type Frame struct {
	Width, Height, Stride int
	Pix                   []float32
}

// NewFrame returns a w x h frame with Stride w.
func NewFrame(w, h int) *Frame {
	return &Frame{Width: w, Height: h, Stride: w, Pix: make([]float32, w*h)}
}

// Reset makes f a w x h frame with Stride w, reusing its buffer when large enough.
func (f *Frame) Reset(w, h int) {
	n := w * h
	if cap(f.Pix) < n {
		f.Pix = make([]float32, n)
	}
	f.Pix = f.Pix[:n]
	f.Width, f.Height, f.Stride = w, h, w
}

// At returns pixel (x, y).
func (f *Frame) At(x, y int) float32 { return f.Pix[y*f.Stride+x] }

// Valid counts the pixels that are not missing.
func (f *Frame) Valid() int {
	n := 0
	for y := 0; y < f.Height; y++ {
		for _, v := range f.Pix[y*f.Stride : y*f.Stride+f.Width] {
			if !math.IsNaN(float64(v)) {
				n++
			}
		}
	}
	return n
}

// ReadPixels copies the pixels idx (i = y*Width + x) into dst. It lets an
// in-memory frame stand wherever a PixelReader is expected; it reads no
// storage, so it reports 0 bytes.
func (f *Frame) ReadPixels(idx []int32, dst []float32) (int64, error) {
	if len(dst) < len(idx) {
		panic("frames: ReadPixels dst shorter than idx")
	}
	n := int32(f.Width * f.Height)
	for k, i := range idx {
		if i < 0 || i >= n {
			return 0, fmt.Errorf("frames: pixel index %d outside the %dx%d frame", i, f.Width, f.Height)
		}
		if f.Stride == f.Width {
			dst[k] = f.Pix[i]
		} else {
			y, x := int(i)/f.Width, int(i)%f.Width
			dst[k] = f.Pix[y*f.Stride+x]
		}
	}
	return 0, nil
}

// Size returns the frame's width and height.
func (f *Frame) Size() (int, int) { return f.Width, f.Height }

// PixelReader is a frame whose pixels can be read one by one, so a source
// that keeps frames on disk (FITS) reads only what the engine asks for.
type PixelReader interface {
	// Size returns the frame's width and height in pixels.
	Size() (w, h int)
	// ReadPixels reads pixels idx (i = y*w + x, any order) into dst[:len(idx)]
	// and returns the bytes it took from storage.
	ReadPixels(idx []int32, dst []float32) (bytesRead int64, err error)
}

// DefaultMaxPixels is the default largest frame accepted: 64 Mpx (64 x 2^20).
const DefaultMaxPixels = 64 << 20

// FormatError reports bytes that are not a valid image of the format they claim.
type FormatError string

func (e FormatError) Error() string { return "frames: invalid format: " + string(e) }

// UnsupportedError reports a valid file using a feature frames does not read.
type UnsupportedError string

func (e UnsupportedError) Error() string { return "frames: unsupported feature: " + string(e) }

// TooLargeError reports a frame refused before decoding because its header
// declares more pixels than the limit.
type TooLargeError struct {
	Width, Height int64
	Limit         int64
}

func (e *TooLargeError) Error() string {
	return fmt.Sprintf("frames: frame %dx%d (%d pixels) exceeds the %d-pixel limit", e.Width, e.Height, e.Width*e.Height, e.Limit)
}

// SizeMismatchError reports a frame whose size differs from the sequence's.
type SizeMismatchError struct {
	Width, Height, WantWidth, WantHeight int
}

func (e *SizeMismatchError) Error() string {
	return fmt.Sprintf("frames: frame is %dx%d but the sequence is %dx%d; frame skipped", e.Width, e.Height, e.WantWidth, e.WantHeight)
}

// UnsafePathError reports an archive entry whose name escapes its folder.
type UnsafePathError struct{ Name string }

func (e *UnsafePathError) Error() string {
	return fmt.Sprintf("frames: archive entry %q escapes its folder; refused", e.Name)
}

// FileError names the file (or stream item) an error belongs to.
type FileError struct {
	Name string
	Err  error
}

func (e *FileError) Error() string {
	return "frames: " + e.Name + ": " + strings.TrimPrefix(e.Err.Error(), "frames: ")
}
func (e *FileError) Unwrap() error { return e.Err }
