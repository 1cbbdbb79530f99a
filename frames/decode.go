package frames

import (
	"bytes"
	"errors"
	"fmt"
	"image"
	"image/color"
	"image/gif"
	"image/jpeg"
	"image/png"
	"io"
	"path/filepath"
	"strings"

	"golang.org/x/image/bmp"
	"golang.org/x/image/tiff"
	"golang.org/x/image/webp"
)

// Format names an image file format.
type Format string

// The formats frames reads.
const (
	Unknown Format = ""
	PNG     Format = "png"
	JPEG    Format = "jpeg"
	GIF     Format = "gif"
	BMP     Format = "bmp"
	TIFF    Format = "tiff"
	WebP    Format = "webp"
	FITS    Format = "fits"
)

// Sniff names the format of data from its first bytes (magic numbers).
func Sniff(data []byte) Format {
	switch {
	case bytes.HasPrefix(data, []byte("\x89PNG\r\n\x1a\n")):
		return PNG
	case bytes.HasPrefix(data, []byte{0xff, 0xd8, 0xff}):
		return JPEG
	case bytes.HasPrefix(data, []byte("GIF87a")), bytes.HasPrefix(data, []byte("GIF89a")):
		return GIF
	case bytes.HasPrefix(data, []byte("BM")):
		return BMP
	case bytes.HasPrefix(data, []byte("II*\x00")), bytes.HasPrefix(data, []byte("MM\x00*")):
		return TIFF
	case len(data) >= 12 && string(data[:4]) == "RIFF" && string(data[8:12]) == "WEBP":
		return WebP
	case bytes.HasPrefix(data, []byte("SIMPLE  =")):
		return FITS
	}
	return Unknown
}

// FormatOf names the format a file name's extension claims (Unknown when
// the extension is not one of ours). Sources use it to pick frame files out
// of a folder; the decoder trusts the bytes, not the name.
func FormatOf(name string) Format {
	switch strings.ToLower(filepath.Ext(name)) {
	case ".png":
		return PNG
	case ".jpg", ".jpeg", ".jpe", ".jfif":
		return JPEG
	case ".gif":
		return GIF
	case ".bmp", ".dib":
		return BMP
	case ".tif", ".tiff":
		return TIFF
	case ".webp":
		return WebP
	case ".fits", ".fit", ".fts":
		return FITS
	}
	return Unknown
}

// DecodeConfig returns the format and size of the image in data without
// decoding its pixels. FITS is sized by frames/fits, not here.
func DecodeConfig(data []byte) (Format, image.Config, error) {
	f := Sniff(data)
	if len(data) == 0 {
		return f, image.Config{}, FormatError("empty file (0 bytes)")
	}
	var cfg image.Config
	var err error
	r := bytes.NewReader(data)
	switch f {
	case PNG:
		cfg, err = png.DecodeConfig(r)
	case JPEG:
		cfg, err = jpeg.DecodeConfig(r)
	case GIF:
		cfg, err = gif.DecodeConfig(r)
	case BMP:
		cfg, err = bmp.DecodeConfig(r)
	case TIFF:
		cfg, err = tiff.DecodeConfig(r)
	case WebP:
		cfg, err = webp.DecodeConfig(r)
	case FITS:
		return f, cfg, UnsupportedError("FITS is read by frames/fits, not as an image")
	default:
		return f, cfg, FormatError(fmt.Sprintf("not an image this program reads (starts with %q)", head(data)))
	}
	if err != nil {
		return f, cfg, wrapDecodeErr(f, err)
	}
	return f, cfg, nil
}

// Decode decodes the image in data into dst (reusing its buffer), after
// checking with DecodeConfig that it has at most maxPixels pixels
// (0 = DefaultMaxPixels). Colour becomes BT.601 luma; see FromImage.
func Decode(data []byte, maxPixels int64, dst *Frame) (Format, error) {
	f, cfg, err := DecodeConfig(data)
	if err != nil {
		return f, err
	}
	if err := CheckSize(int64(cfg.Width), int64(cfg.Height), maxPixels); err != nil {
		return f, err
	}
	r := bytes.NewReader(data)
	var img image.Image
	switch f {
	case PNG:
		img, err = png.Decode(r)
	case JPEG:
		img, err = jpeg.Decode(r)
	case GIF:
		img, err = gif.Decode(r)
	case BMP:
		img, err = bmp.Decode(r)
	case TIFF:
		img, err = tiff.Decode(r)
	case WebP:
		img, err = webp.Decode(r)
	}
	if err != nil {
		return f, wrapDecodeErr(f, err)
	}
	FromImage(img, dst)
	return f, nil
}

// CheckSize refuses a w x h frame that is empty or has more than maxPixels
// pixels (0 = DefaultMaxPixels).
func CheckSize(w, h, maxPixels int64) error {
	if maxPixels <= 0 {
		maxPixels = DefaultMaxPixels
	}
	if w <= 0 || h <= 0 {
		return FormatError(fmt.Sprintf("frame size %dx%d is empty", w, h))
	}
	if w > maxPixels || h > maxPixels || w*h > maxPixels {
		return &TooLargeError{Width: w, Height: h, Limit: maxPixels}
	}
	return nil
}

// wrapDecodeErr turns a decoder's error into a FormatError or
// UnsupportedError naming the format; io.EOF means the file was cut short.
func wrapDecodeErr(f Format, err error) error {
	name := strings.ToUpper(string(f))
	if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) || strings.Contains(err.Error(), "not enough pixel data") {
		return FormatError(name + " data ends early (truncated file)")
	}
	var pu png.UnsupportedError
	var ju jpeg.UnsupportedError
	var tu tiff.UnsupportedError
	if errors.As(err, &pu) || errors.As(err, &ju) || errors.As(err, &tu) {
		return UnsupportedError(name + ": " + err.Error())
	}
	return FormatError(name + ": " + err.Error())
}

// head returns up to 8 leading bytes of data for an error message.
func head(data []byte) []byte {
	if len(data) > 8 {
		return data[:8]
	}
	return data
}

// BT.601 luma weights: ITU-R Recommendation BT.601-7 (2011), section 2.5.1,
// E'Y = 0.299 E'R + 0.587 E'G + 0.114 E'B.
const (
	wR = 0.299
	wG = 0.587
	wB = 0.114
)

// Luma returns the BT.601 luma of (r, g, b), in the units of its inputs.
func Luma(r, g, b float32) float32 { return wR*r + wG*g + wB*b }

// FromImage converts img into dst (reusing its buffer): grey stays grey,
// colour becomes BT.601 luma, in native units (0..255 for 8-bit images,
// 0..65535 for 16-bit ones). Alpha is ignored: a non-premultiplied colour
// is used as stored, a premultiplied one as composited over black. The
// concrete type is asserted once, outside the pixel loops; At is the
// fallback for types without a fast path.
func FromImage(img image.Image, dst *Frame) {
	b := img.Bounds()
	w, h := b.Dx(), b.Dy()
	dst.Reset(w, h)
	switch m := img.(type) {
	case *image.Gray:
		for y := 0; y < h; y++ {
			src := m.Pix[y*m.Stride : y*m.Stride+w]
			out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
			for x, v := range src {
				out[x] = float32(v)
			}
		}
	case *image.Gray16:
		for y := 0; y < h; y++ {
			src := m.Pix[y*m.Stride : y*m.Stride+2*w]
			out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
			for x := range out {
				out[x] = float32(uint16(src[2*x])<<8 | uint16(src[2*x+1]))
			}
		}
	case *image.YCbCr:
		// JPEG (JFIF) stores Y computed with the BT.601 weights already
		// (JFIF 1.02, section 7): Y is the luma, chroma is not needed.
		for y := 0; y < h; y++ {
			src := m.Y[y*m.YStride : y*m.YStride+w]
			out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
			for x, v := range src {
				out[x] = float32(v)
			}
		}
	case *image.RGBA:
		rgba8(m.Pix, m.Stride, w, h, dst)
	case *image.NRGBA:
		rgba8(m.Pix, m.Stride, w, h, dst)
	case *image.RGBA64:
		rgba16(m.Pix, m.Stride, w, h, dst)
	case *image.NRGBA64:
		rgba16(m.Pix, m.Stride, w, h, dst)
	case *image.Paletted:
		var lut [256]float32
		for i, c := range m.Palette {
			lut[i] = luma8(c)
		}
		for y := 0; y < h; y++ {
			src := m.Pix[y*m.Stride : y*m.Stride+w]
			out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
			for x, v := range src {
				out[x] = lut[v]
			}
		}
	default:
		sixteen := false
		switch img.ColorModel() {
		case color.Gray16Model, color.RGBA64Model, color.NRGBA64Model:
			sixteen = true
		}
		scale := float32(1.0 / 257)
		if sixteen {
			scale = 1
		}
		for y := 0; y < h; y++ {
			out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
			for x := range out {
				r, g, bb, _ := img.At(b.Min.X+x, b.Min.Y+y).RGBA()
				out[x] = Luma(float32(r), float32(g), float32(bb)) * scale
			}
		}
	}
}

func rgba8(pix []uint8, stride, w, h int, dst *Frame) {
	for y := 0; y < h; y++ {
		src := pix[y*stride : y*stride+4*w]
		out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
		for x := range out {
			p := src[4*x : 4*x+3 : 4*x+3]
			out[x] = wR*float32(p[0]) + wG*float32(p[1]) + wB*float32(p[2])
		}
	}
}

func rgba16(pix []uint8, stride, w, h int, dst *Frame) {
	for y := 0; y < h; y++ {
		src := pix[y*stride : y*stride+8*w]
		out := dst.Pix[y*dst.Stride : y*dst.Stride+w]
		for x := range out {
			p := src[8*x : 8*x+6 : 8*x+6]
			r := uint16(p[0])<<8 | uint16(p[1])
			g := uint16(p[2])<<8 | uint16(p[3])
			b := uint16(p[4])<<8 | uint16(p[5])
			out[x] = wR*float32(r) + wG*float32(g) + wB*float32(b)
		}
	}
}

// luma8 returns the BT.601 luma of c in 8-bit units.
func luma8(c color.Color) float32 {
	if c == nil {
		return 0
	}
	r, g, b, _ := c.RGBA()
	return Luma(float32(r), float32(g), float32(b)) / 257
}
