package frames

import (
	"bytes"
	"errors"
	"image"
	"image/color"
	"image/color/palette"
	"image/gif"
	"image/jpeg"
	"image/png"
	"math"
	"os"
	"strings"
	"testing"

	"golang.org/x/image/bmp"
	"golang.org/x/image/tiff"
)

func mustEncode(t *testing.T, enc func(*bytes.Buffer) error) []byte {
	t.Helper()
	var b bytes.Buffer
	if err := enc(&b); err != nil {
		t.Fatal(err)
	}
	return b.Bytes()
}

func mustDecode(t *testing.T, data []byte) (*Frame, Format) {
	t.Helper()
	var f Frame
	fm, err := Decode(data, 0, &f)
	if err != nil {
		t.Fatalf("Decode: %v", err)
	}
	return &f, fm
}

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

// TestBT601Luma checks luma of known colours against ITU-R BT.601-7,
// section 2.5.1: E'Y = 0.299 E'R + 0.587 E'G + 0.114 E'B (the weights sum
// to 1, so white stays white). Expected values are the formula worked by
// hand for 8-bit codes.
func TestBT601Luma(t *testing.T) {
	colours := []struct {
		name    string
		c       color.NRGBA
		want    float64
		want16  float64 // same colour scaled to 16 bits (x 257)
		jpegTol float64
	}{
		{"Red", color.NRGBA{255, 0, 0, 255}, 76.245, 19594.965, 0},
		{"Green", color.NRGBA{0, 255, 0, 255}, 149.685, 38469.045, 0},
		{"Blue", color.NRGBA{0, 0, 255, 255}, 29.07, 7470.99, 0},
		{"White", color.NRGBA{255, 255, 255, 255}, 255, 65535, 0},
		{"Black", color.NRGBA{0, 0, 0, 255}, 0, 0, 0},
		{"Yellow", color.NRGBA{255, 255, 0, 255}, 225.93, 58064.01, 0},
		{"Grey128", color.NRGBA{128, 128, 128, 255}, 128, 32896, 0},
		{"Orange", color.NRGBA{255, 128, 0, 255}, 0.299*255 + 0.587*128, (0.299*255 + 0.587*128) * 257, 0},
	}
	for _, tc := range colours {
		t.Run(tc.name, func(t *testing.T) {
			if got := float64(Luma(float32(tc.c.R), float32(tc.c.G), float32(tc.c.B))); !near(got, tc.want, 1e-4) {
				t.Errorf("Luma = %v, want %v", got, tc.want)
			}
			// 8-bit RGB PNG.
			img := image.NewNRGBA(image.Rect(0, 0, 2, 1))
			img.SetNRGBA(0, 0, tc.c)
			img.SetNRGBA(1, 0, tc.c)
			f, _ := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return png.Encode(b, img) }))
			if got := float64(f.At(1, 0)); !near(got, tc.want, 1e-3) {
				t.Errorf("PNG RGB luma = %v, want %v", got, tc.want)
			}
			// 16-bit RGB PNG keeps 16-bit units and precision.
			img16 := image.NewRGBA64(image.Rect(0, 0, 1, 1))
			img16.SetRGBA64(0, 0, color.RGBA64{uint16(tc.c.R) * 257, uint16(tc.c.G) * 257, uint16(tc.c.B) * 257, 65535})
			f16, _ := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return png.Encode(b, img16) }))
			if got := float64(f16.At(0, 0)); !near(got, tc.want16, 0.01) {
				t.Errorf("PNG RGB16 luma = %v, want %v", got, tc.want16)
			}
			// Palette PNG.
			pal := image.NewPaletted(image.Rect(0, 0, 1, 1), color.Palette{color.Black, tc.c})
			pal.SetColorIndex(0, 0, 1)
			fp, _ := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return png.Encode(b, pal) }))
			if got := float64(fp.At(0, 0)); !near(got, tc.want, 1e-3) {
				t.Errorf("palette PNG luma = %v, want %v", got, tc.want)
			}
			// BMP (24-bit).
			fb, fm := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return bmp.Encode(b, img) }))
			if fm != BMP || !near(float64(fb.At(0, 0)), tc.want, 1e-3) {
				t.Errorf("BMP (%s) luma = %v, want %v", fm, fb.At(0, 0), tc.want)
			}
		})
	}
}

// TestRoundTrip16 checks that 16-bit grey survives PNG (PNG spec, ISO/IEC
// 15948:2004, bit depth 16) and TIFF (TIFF 6.0, BitsPerSample 16; Adobe
// Deflate compression) encode/decode exactly, value for value.
func TestRoundTrip16(t *testing.T) {
	const w, h = 37, 11
	img := image.NewGray16(image.Rect(0, 0, w, h))
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			img.SetGray16(x, y, color.Gray16{uint16((x*1789 + y*40503 + x*y*7) % 65536)})
		}
	}
	img.SetGray16(0, 0, color.Gray16{65535})
	img.SetGray16(1, 0, color.Gray16{1})
	files := map[string][]byte{
		"PNG":         mustEncode(t, func(b *bytes.Buffer) error { return png.Encode(b, img) }),
		"TIFF":        mustEncode(t, func(b *bytes.Buffer) error { return tiff.Encode(b, img, nil) }),
		"TIFFDeflate": mustEncode(t, func(b *bytes.Buffer) error { return tiff.Encode(b, img, &tiff.Options{Compression: tiff.Deflate}) }),
	}
	for name, data := range files {
		t.Run(name, func(t *testing.T) {
			f, _ := mustDecode(t, data)
			if f.Width != w || f.Height != h {
				t.Fatalf("size %dx%d", f.Width, f.Height)
			}
			for y := 0; y < h; y++ {
				for x := 0; x < w; x++ {
					if got, want := f.At(x, y), float32(img.Gray16At(x, y).Y); got != want {
						t.Fatalf("(%d,%d) = %v, want %v", x, y, got, want)
					}
				}
			}
		})
	}
	// 16-bit colour TIFF: luma in 16-bit units.
	c := image.NewRGBA64(image.Rect(0, 0, 1, 1))
	c.SetRGBA64(0, 0, color.RGBA64{1000, 30000, 65535, 65535})
	f, _ := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return tiff.Encode(b, c, &tiff.Options{Compression: tiff.Deflate}) }))
	if want := 0.299*1000 + 0.587*30000 + 0.114*65535; !near(float64(f.At(0, 0)), want, 0.01) {
		t.Errorf("TIFF RGB16 luma %v, want %v", f.At(0, 0), want)
	}
}

func TestOtherFormats(t *testing.T) {
	g := image.NewGray(image.Rect(0, 0, 16, 16))
	for i := range g.Pix {
		g.Pix[i] = uint8(i)
	}
	t.Run("JPEGGrey", func(t *testing.T) {
		f, fm := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return jpeg.Encode(b, g, &jpeg.Options{Quality: 100}) }))
		if fm != JPEG {
			t.Fatalf("format %s", fm)
		}
		for i, v := range g.Pix {
			if !near(float64(f.Pix[i]), float64(v), 3) {
				t.Fatalf("pixel %d = %v, want about %d", i, f.Pix[i], v)
			}
		}
	})
	t.Run("JPEGColourY", func(t *testing.T) {
		// Flat colour: JFIF's Y (BT.601 weights, JFIF 1.02 section 7) is the luma.
		c := image.NewRGBA(image.Rect(0, 0, 16, 16))
		for i := 0; i < len(c.Pix); i += 4 {
			c.Pix[i], c.Pix[i+1], c.Pix[i+2], c.Pix[i+3] = 200, 100, 50, 255
		}
		f, _ := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return jpeg.Encode(b, c, &jpeg.Options{Quality: 100}) }))
		if want := 0.299*200 + 0.587*100 + 0.114*50; !near(float64(f.At(8, 8)), want, 1.5) {
			t.Errorf("luma %v, want %v", f.At(8, 8), want)
		}
	})
	t.Run("GIF", func(t *testing.T) {
		p := image.NewPaletted(image.Rect(0, 0, 4, 1), palette.Plan9)
		p.SetColorIndex(2, 0, 5)
		f, fm := mustDecode(t, mustEncode(t, func(b *bytes.Buffer) error { return gif.Encode(b, p, nil) }))
		r, gg, bb, _ := palette.Plan9[5].RGBA()
		if want := (0.299*float64(r) + 0.587*float64(gg) + 0.114*float64(bb)) / 257; fm != GIF || !near(float64(f.At(2, 0)), want, 1e-3) {
			t.Errorf("GIF (%s) luma %v, want %v", fm, f.At(2, 0), want)
		}
	})
	t.Run("WebPLosslessMatchesPNG", func(t *testing.T) {
		webpData, err := os.ReadFile("testdata/gopher-doc.8bpp.lossless.webp")
		if err != nil {
			t.Fatal(err)
		}
		pngData, err := os.ReadFile("testdata/gopher-doc.8bpp.png")
		if err != nil {
			t.Fatal(err)
		}
		fw, fm := mustDecode(t, webpData)
		fp, _ := mustDecode(t, pngData)
		if fm != WebP || fw.Width != fp.Width || fw.Height != fp.Height {
			t.Fatalf("WebP (%s) %dx%d vs PNG %dx%d", fm, fw.Width, fw.Height, fp.Width, fp.Height)
		}
		for i := range fw.Pix {
			if !near(float64(fw.Pix[i]), float64(fp.Pix[i]), 1e-3) {
				t.Fatalf("pixel %d: WebP %v, PNG %v", i, fw.Pix[i], fp.Pix[i])
			}
		}
	})
}

// TestDecodeErrors: each bad input is a named error, no panic.
func TestDecodeErrors(t *testing.T) {
	good := mustEncode(t, func(b *bytes.Buffer) error { return png.Encode(b, image.NewGray(image.Rect(0, 0, 64, 64))) })
	huge := hugePNGHeader(100000, 100000)
	tests := []struct {
		name string
		data []byte
		want string
		kind any
	}{
		{"ZeroByte", nil, "empty file", FormatError("")},
		{"Text", []byte("hello, I am not a picture\n"), "not an image", FormatError("")},
		{"TruncatedPNG", good[:len(good)/2], "PNG", FormatError("")},
		{"Huge", huge, "exceeds the", &TooLargeError{}},
		{"FITSAsImage", []byte("SIMPLE  =                    T"), "frames/fits", UnsupportedError("")},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var f Frame
			_, err := Decode(tc.data, 64<<20, &f)
			if err == nil || !strings.Contains(err.Error(), tc.want) || !strings.HasPrefix(err.Error(), "frames:") {
				t.Fatalf("error %v, want one containing %q", err, tc.want)
			}
			switch tc.kind.(type) {
			case FormatError:
				var e FormatError
				if !errors.As(err, &e) {
					t.Errorf("%T is not a FormatError", err)
				}
			case UnsupportedError:
				var e UnsupportedError
				if !errors.As(err, &e) {
					t.Errorf("%T is not an UnsupportedError", err)
				}
			case *TooLargeError:
				var e *TooLargeError
				if !errors.As(err, &e) {
					t.Errorf("%T is not a TooLargeError", err)
				}
			}
		})
	}
}

// hugePNGHeader returns a PNG signature and an IHDR chunk (PNG spec section
// 11.2.2) declaring a w x h 8-bit grey image, with no pixel data: the size
// check must refuse it before any decoding.
func hugePNGHeader(w, h uint32) []byte {
	var b bytes.Buffer
	b.WriteString("\x89PNG\r\n\x1a\n")
	ihdr := []byte{'I', 'H', 'D', 'R', byte(w >> 24), byte(w >> 16), byte(w >> 8), byte(w), byte(h >> 24), byte(h >> 16), byte(h >> 8), byte(h), 8, 0, 0, 0, 0}
	b.Write([]byte{0, 0, 0, 13})
	b.Write(ihdr)
	crc := crc32IEEE(ihdr)
	b.Write([]byte{byte(crc >> 24), byte(crc >> 16), byte(crc >> 8), byte(crc)})
	return b.Bytes()
}
