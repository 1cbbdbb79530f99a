package fits

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
)

// File is the primary image of an open FITS file: NAXIS1 x NAXIS2 pixels
// per plane, NAXIS3 planes (1 for a 2-D image). Row 0 is the first row on
// disk (FITS counts rows upward, so a display may flip it). A File is not
// safe for concurrent use: it reuses one read buffer.
type File struct {
	Header
	Width, Height, Planes int

	r          io.ReaderAt
	size       int64
	dataStart  int64
	bpp        int // bytes per pixel, |BITPIX|/8
	unsigned16 bool
	buf        []byte
	// MergeGap lets ReadPixels read through gaps of up to this many bytes
	// between requested pixels in one ReadAt (fewer calls, more bytes).
	// 0 reads exactly the requested pixels.
	MergeGap int
}

// Open parses the primary header of the FITS file r (size bytes) and checks
// the data are all there. maxPixels (0 = no limit) refuses planes that are
// too large before anything else is read.
func Open(r io.ReaderAt, size int64, maxPixels int64) (*File, error) {
	if size < BlockSize {
		if size == 0 {
			return nil, FormatError("empty file (0 bytes)")
		}
		return nil, FormatError(fmt.Sprintf("file is %d bytes, shorter than one 2880-byte block (section 3.1)", size))
	}
	blk := make([]byte, BlockSize)
	h, err := parseHeader(func(b int) ([]byte, error) {
		off := int64(b) * BlockSize
		if off+BlockSize > size {
			return nil, FormatError("header runs past the end of the file (no END card)")
		}
		if err := readAt(r, blk, off); err != nil {
			return nil, err
		}
		return blk, nil
	})
	if err != nil {
		return nil, err
	}
	f := &File{Header: *h, r: r, size: size, dataStart: h.Bytes, bpp: abs(h.Bitpix) / 8}
	switch {
	case len(h.Naxis) == 0:
		return nil, UnsupportedError("the primary HDU holds no image (NAXIS = 0); extensions are not read")
	case len(h.Naxis) == 1:
		return nil, UnsupportedError(fmt.Sprintf("a 1-D primary array (NAXIS = 1, NAXIS1 = %d) is not an image", h.Naxis[0]))
	}
	for i := 3; i < len(h.Naxis); i++ {
		if h.Naxis[i] != 1 {
			return nil, UnsupportedError(fmt.Sprintf("NAXIS%d = %d: only 2-D images and 3-D stacks of planes are read", i+1, h.Naxis[i]))
		}
	}
	w, ht, planes := h.Naxis[0], h.Naxis[1], int64(1)
	if len(h.Naxis) >= 3 {
		planes = h.Naxis[2]
	}
	if w == 0 || ht == 0 || planes == 0 {
		return nil, FormatError(fmt.Sprintf("image has no pixels (%dx%d, %d planes)", w, ht, planes))
	}
	if maxPixels > 0 && (w > maxPixels || ht > maxPixels || w > maxPixels/ht) {
		return nil, &TooLargeError{Width: w, Height: ht, Limit: maxPixels}
	}
	const maxAxis = 1 << 30
	if w > maxAxis || ht > maxAxis || planes > maxAxis || w*ht > maxAxis || w*ht*planes > math.MaxInt64/8 {
		return nil, UnsupportedError(fmt.Sprintf("image %dx%dx%d is too large to address", w, ht, planes))
	}
	data := w * ht * planes * int64(f.bpp)
	if f.dataStart+data > size {
		return nil, FormatError(fmt.Sprintf("data need %d bytes after the %d-byte header but the file has %d (truncated)", data, f.dataStart, size-f.dataStart))
	}
	if size%BlockSize != 0 {
		return nil, FormatError(fmt.Sprintf("file size %d is not a whole number of 2880-byte blocks (section 3.1)", size))
	}
	f.Width, f.Height, f.Planes = int(w), int(ht), int(planes)
	f.unsigned16 = h.Bitpix == 16 && h.Bscale == 1 && h.Bzero == 32768 && !h.HasBlank
	return f, nil
}

// TooLargeError reports a plane with more pixels than the caller allows.
type TooLargeError struct{ Width, Height, Limit int64 }

func (e *TooLargeError) Error() string {
	return fmt.Sprintf("frames: fits: image %dx%d (%d pixels) exceeds the %d-pixel limit", e.Width, e.Height, e.Width*e.Height, e.Limit)
}

// HeaderBytes is the size of the header on disk; Open has read it all.
func (f *File) HeaderBytes() int64 { return f.dataStart }

// PlaneBytes is the size of one plane's data on disk.
func (f *File) PlaneBytes() int64 { return int64(f.Width) * int64(f.Height) * int64(f.bpp) }

// ReadPlane reads plane p whole into dst[:Width*Height] as physical values
// (BZERO + BSCALE * stored value, section 4.4.2.5); BLANK and NaN become
// NaN. It returns the bytes read.
func (f *File) ReadPlane(p int, dst []float32) (int64, error) {
	n := f.Width * f.Height
	if p < 0 || p >= f.Planes {
		return 0, fmt.Errorf("frames: fits: plane %d outside 0..%d", p, f.Planes-1)
	}
	if len(dst) < n {
		panic("frames: fits: ReadPlane dst shorter than a plane")
	}
	nb := n * f.bpp
	if cap(f.buf) < nb {
		f.buf = make([]byte, nb)
	}
	buf := f.buf[:nb]
	if err := readAt(f.r, buf, f.dataStart+int64(p)*f.PlaneBytes()); err != nil {
		return 0, err
	}
	f.convert(buf, dst[:n])
	return int64(nb), nil
}

// ReadPixels reads pixels idx (i = y*Width + x, any order; runs of
// consecutive indices are read with one ReadAt) of plane p into dst and
// returns the bytes read from the file.
func (f *File) ReadPixels(p int, idx []int32, dst []float32) (int64, error) {
	if p < 0 || p >= f.Planes {
		return 0, fmt.Errorf("frames: fits: plane %d outside 0..%d", p, f.Planes-1)
	}
	if len(dst) < len(idx) {
		panic("frames: fits: ReadPixels dst shorter than idx")
	}
	n := int32(f.Width * f.Height)
	base := f.dataStart + int64(p)*f.PlaneBytes()
	gap := int32(f.MergeGap / f.bpp)
	var total int64
	for i := 0; i < len(idx); {
		first := idx[i]
		if first < 0 || first >= n {
			return total, fmt.Errorf("frames: fits: pixel index %d outside the %dx%d plane", first, f.Width, f.Height)
		}
		j, last := i+1, first
		for j < len(idx) && idx[j] > last && idx[j]-last <= gap+1 && idx[j] < n {
			last = idx[j]
			j++
		}
		nb := int(last-first+1) * f.bpp
		if cap(f.buf) < nb {
			f.buf = make([]byte, nb)
		}
		buf := f.buf[:nb]
		if err := readAt(f.r, buf, base+int64(first)*int64(f.bpp)); err != nil {
			return total, err
		}
		total += int64(nb)
		if j-i == int(last-first+1) {
			f.convert(buf, dst[i:j])
		} else {
			for k := i; k < j; k++ {
				o := int(idx[k]-first) * f.bpp
				f.convert(buf[o:o+f.bpp], dst[k:k+1])
			}
		}
		i = j
	}
	return total, nil
}

// convert turns big-endian stored values (section 5) into physical values.
// The BITPIX switch sits outside the pixel loops.
func (f *File) convert(src []byte, dst []float32) {
	bs, bz := f.Bscale, f.Bzero
	blank, hasBlank := f.Blank, f.HasBlank
	be := binary.BigEndian
	nan := float32(math.NaN())
	switch f.Bitpix {
	case 8:
		for i := range dst {
			v := int64(src[i])
			if hasBlank && v == blank {
				dst[i] = nan
				continue
			}
			dst[i] = float32(bz + bs*float64(v))
		}
	case 16:
		if f.unsigned16 {
			for i := range dst {
				dst[i] = float32(be.Uint16(src[2*i:]) ^ 0x8000)
			}
			return
		}
		for i := range dst {
			v := int64(int16(be.Uint16(src[2*i:])))
			if hasBlank && v == blank {
				dst[i] = nan
				continue
			}
			dst[i] = float32(bz + bs*float64(v))
		}
	case 32:
		for i := range dst {
			v := int64(int32(be.Uint32(src[4*i:])))
			if hasBlank && v == blank {
				dst[i] = nan
				continue
			}
			dst[i] = float32(bz + bs*float64(v))
		}
	case 64:
		for i := range dst {
			v := int64(be.Uint64(src[8*i:]))
			if hasBlank && v == blank {
				dst[i] = nan
				continue
			}
			dst[i] = float32(bz + bs*float64(v))
		}
	case -32:
		for i := range dst {
			v := float64(math.Float32frombits(be.Uint32(src[4*i:])))
			dst[i] = physFloat(v, bs, bz)
		}
	case -64:
		for i := range dst {
			v := math.Float64frombits(be.Uint64(src[8*i:]))
			dst[i] = physFloat(v, bs, bz)
		}
	}
}

// physFloat scales a stored IEEE value; NaN (undefined, section 5.3) and
// infinities (which no statistic can use) become NaN, the missing mark.
func physFloat(v, bs, bz float64) float32 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return float32(math.NaN())
	}
	return float32(bz + bs*v)
}

// readAt fills buf from off; a full read that also reports io.EOF (allowed
// by io.ReaderAt at the end of the input) is a success.
func readAt(r io.ReaderAt, buf []byte, off int64) error {
	n, err := r.ReadAt(buf, off)
	if n == len(buf) {
		return nil
	}
	if err == nil {
		err = io.ErrUnexpectedEOF
	}
	return readErr(err)
}

func readErr(err error) error {
	if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
		return FormatError("file ends early (truncated)")
	}
	return fmt.Errorf("frames: fits: %w", err)
}

func abs(x int) int {
	if x < 0 {
		return -x
	}
	return x
}

// Plane is one plane of a File as a frames.PixelReader.
type Plane struct {
	F *File
	P int
}

// Size returns the plane's width and height.
func (pl Plane) Size() (int, int) { return pl.F.Width, pl.F.Height }

// ReadPixels reads pixels idx of the plane; see File.ReadPixels.
func (pl Plane) ReadPixels(idx []int32, dst []float32) (int64, error) {
	return pl.F.ReadPixels(pl.P, idx, dst)
}
