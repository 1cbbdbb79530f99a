package review

import (
	"bytes"
	"context"
	"fmt"
	"hash/crc32"
	"image"
	"image/png"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"sparsewatch/frames"
	"sparsewatch/frames/fits"
)

func pngFrame(t *testing.T, w, h int, rng *rand.Rand, flat bool) []byte {
	t.Helper()
	img := image.NewGray16(image.Rect(0, 0, w, h))
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			v := 1000 + 20*rng.NormFloat64()
			if flat && x == 0 && y == 0 {
				v = 1000 // a pixel with zero variance over the reference frames
			}
			img.Pix[2*(y*w+x)] = uint8(uint16(v) >> 8)
			img.Pix[2*(y*w+x)+1] = uint8(uint16(v))
		}
	}
	var b bytes.Buffer
	if err := png.Encode(&b, img); err != nil {
		t.Fatal(err)
	}
	return b.Bytes()
}

// TestBadInputsScanGoesOn puts every bad input of the table into a
// folder of good frames: each is reported by file with its reason, nothing
// panics, and every good frame is still scanned.
func TestBadInputsScanGoesOn(t *testing.T) {
	dir := t.TempDir()
	rng := rand.New(rand.NewPCG(1, 2))
	const w, h, good = 16, 12, 40
	bad := map[int]badFile{}
	var nanPlane bytes.Buffer
	fits.WriteUint16(&nanPlane, w, h, make([]float32, w*h)) // a valid FITS, cut short below
	goodPNG := pngFrame(t, w, h, rng, true)
	bad[3] = with("frame3.png", goodPNG[:len(goodPNG)/2], "truncated")
	bad[7] = with("frame7.png", nil, "empty file")
	bad[12] = with("frame12.png", []byte("not a picture at all"), "not an image")
	bad[25] = with("frame25.png", hugeHeader(100000, 100000), "exceeds the")
	bad[31] = with("frame31.png", pngFrame(t, w+1, h, rng, false), "but the sequence is 16x12")
	bad[36] = with("frame36.fits", nanPlane.Bytes()[:nanPlane.Len()-10], "2880-byte blocks")
	bad[42] = with("frame42.fits", allNaNFITS(w, h), "missing")
	n := good + len(bad)
	for i := 0; i < n; i++ {
		if b, ok := bad[i]; ok {
			os.WriteFile(filepath.Join(dir, b.name), b.data, 0o644)
			continue
		}
		os.WriteFile(filepath.Join(dir, fmt.Sprintf("frame%d.png", i)), pngFrame(t, w, h, rng, true), 0o644)
	}
	src, _, err := frames.OpenFolder(dir, frames.Options{})
	if err != nil {
		t.Fatal(err)
	}
	p := DefaultParams()
	p.ReferenceFrames = 20
	p.Limit = 1e6
	rep, err := Run(context.Background(), src, p, Hooks{})
	if err != nil {
		t.Fatal(err)
	}
	if rep.Frames != good {
		t.Errorf("scanned %d good frames, want %d", rep.Frames, good)
	}
	if len(rep.Errors) != len(bad) {
		t.Errorf("%d errors, want %d: %+v", len(rep.Errors), len(bad), rep.Errors)
	}
	for _, e := range rep.Errors {
		b, ok := bad[e.Frame]
		if !ok || e.File != b.name || !strings.Contains(e.Reason, b.want) {
			t.Errorf("error %+v, want file %q with %q", e, b.name, b.want)
		}
	}
	found := false
	for _, w := range rep.Warnings {
		if strings.Contains(w, "zero spread") {
			found = true
		}
	}
	if !found {
		t.Errorf("no warning about the zero-variance pixel: %v", rep.Warnings)
	}
}

type badFile struct {
	name string
	data []byte
	want string
}

func with(name string, data []byte, want string) badFile { return badFile{name, data, want} }

func allNaNFITS(w, h int) []byte {
	var b bytes.Buffer
	cards := []string{"SIMPLE  =                    T", "BITPIX  =                  -32", "NAXIS   =                    2",
		fmt.Sprintf("NAXIS1  = %20d", w), fmt.Sprintf("NAXIS2  = %20d", h), "END"}
	for _, c := range cards {
		fmt.Fprintf(&b, "%-80s", c)
	}
	for b.Len()%2880 != 0 {
		b.WriteByte(' ')
	}
	for i := 0; i < w*h; i++ {
		b.Write([]byte{0x7f, 0xc0, 0, 0}) // quiet NaN
	}
	for b.Len()%2880 != 0 {
		b.WriteByte(0)
	}
	return b.Bytes()
}

// hugeHeader is a PNG signature and IHDR declaring a w x h image.
func hugeHeader(w, h uint32) []byte {
	var b bytes.Buffer
	img := image.NewGray(image.Rect(0, 0, 1, 1))
	png.Encode(&b, img)
	out := b.Bytes()[:33]
	be := func(o int, v uint32) {
		out[o], out[o+1], out[o+2], out[o+3] = byte(v>>24), byte(v>>16), byte(v>>8), byte(v)
	}
	be(16, w)
	be(20, h)
	crc := crc32.ChecksumIEEE(out[12:29])
	be(29, crc)
	return out
}
