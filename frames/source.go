package frames

import (
	"errors"
	"fmt"
	"math"
)

// Item is one entry of a Source: a frame, or the error that kept a file
// from being one. A bad item does not end the sequence.
type Item struct {
	Index int    // position in the sequence from 0; bad items count too
	Name  string // file name, archive entry or "stdin#N"
	Err   error  // non-nil: no frame here (a *FileError naming the file)
	// Pixels reads the frame's pixels; it is the decoded *Frame itself for
	// images, or a reader that goes to storage for each request (FITS).
	// Valid until the next call to Next.
	Pixels PixelReader
	// Frame is the decoded frame when the whole frame is in memory, else nil.
	Frame *Frame
	// Bytes is what producing the item took from storage (the whole file
	// for an image, the header for a FITS plane); reads through Pixels add
	// their own count.
	Bytes int64
}

// Source yields frames in order. Next returns io.EOF after the last item;
// any other error from Next is fatal to the source (per-file problems come
// as items with Err set instead).
type Source interface {
	Next() (Item, error)
	// Len returns the number of items expected, or -1 when unknown.
	Len() int
	Close() error
}

// WholeReader is a PixelReader that can also read the whole frame at once
// (faster than asking for every index).
type WholeReader interface {
	PixelReader
	ReadAll(dst []float32) (int64, error)
}

// Full returns the item's whole frame, reading it into dst when it is not
// in memory already, and the bytes this took.
func Full(it Item, dst *Frame) (*Frame, int64, error) {
	if it.Frame != nil {
		return it.Frame, 0, nil
	}
	if it.Pixels == nil {
		return nil, 0, errors.New("frames: item has no pixels")
	}
	w, h := it.Pixels.Size()
	dst.Reset(w, h)
	if wr, ok := it.Pixels.(WholeReader); ok {
		n, err := wr.ReadAll(dst.Pix)
		return dst, n, err
	}
	idx := make([]int32, w*h)
	for i := range idx {
		idx[i] = int32(i)
	}
	n, err := it.Pixels.ReadPixels(idx, dst.Pix)
	return dst, n, err
}

// AllMissingError reports a frame in which no pixel has a value.
type AllMissingError struct{ Width, Height int }

func (e *AllMissingError) Error() string {
	return fmt.Sprintf("frames: every pixel of the %dx%d frame is missing (NaN or BLANK)", e.Width, e.Height)
}

// CheckAnyValid returns an *AllMissingError when f has no valid pixel.
func CheckAnyValid(f *Frame) error {
	for y := 0; y < f.Height; y++ {
		for _, v := range f.Pix[y*f.Stride : y*f.Stride+f.Width] {
			if !math.IsNaN(float64(v)) {
				return nil
			}
		}
	}
	return &AllMissingError{f.Width, f.Height}
}

// sizeGate remembers the sequence's frame size (set by its first good
// frame) and rejects others.
type sizeGate struct{ w, h int }

func (g *sizeGate) check(w, h int) error {
	if g.w == 0 {
		g.w, g.h = w, h
		return nil
	}
	if w != g.w || h != g.h {
		return &SizeMismatchError{Width: w, Height: h, WantWidth: g.w, WantHeight: g.h}
	}
	return nil
}

// Options bound what a source accepts.
type Options struct {
	MaxPixels    int64 // largest frame, in pixels (0 = DefaultMaxPixels)
	MaxFileBytes int64 // largest file or archive entry (0 = DefaultMaxFileBytes)
	// FITSMergeGap lets FITS pixel reads run through gaps of up to this
	// many bytes (fewer reads, more bytes); 0 reads exactly the pixels asked.
	FITSMergeGap int
}

// DefaultMaxFileBytes is the default largest frame file: 1 GiB.
const DefaultMaxFileBytes = 1 << 30

func (o Options) maxPixels() int64 {
	if o.MaxPixels <= 0 {
		return DefaultMaxPixels
	}
	return o.MaxPixels
}

func (o Options) maxFileBytes() int64 {
	if o.MaxFileBytes <= 0 {
		return DefaultMaxFileBytes
	}
	return o.MaxFileBytes
}
