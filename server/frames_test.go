package server

import (
	"bytes"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"math/rand/v2"
	"testing"
)

// synthFrames makes n 16-bit grey PNG frames of w x h: noise around 1000
// (sd 40) with a bright 6 x 6 square (+200, 5 sd) during each [start, end) episode.
func synthFrames(t testing.TB, w, h, n int, episodes [][2]int) []upFile {
	t.Helper()
	rng := rand.New(rand.NewPCG(11, 12))
	out := make([]upFile, n)
	for i := range out {
		img := image.NewGray16(image.Rect(0, 0, w, h))
		on := false
		for _, e := range episodes {
			on = on || (i >= e[0] && i < e[1])
		}
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				v := 1000 + 40*rng.NormFloat64()
				if on && x >= w/2 && x < w/2+6 && y >= h/3 && y < h/3+6 {
					v += 200
				}
				img.SetGray16(x, y, color.Gray16{Y: uint16(min(max(v, 0), 65535))})
			}
		}
		var buf bytes.Buffer
		if err := png.Encode(&buf, img); err != nil {
			t.Fatal(err)
		}
		out[i] = upFile{fmt.Sprintf("frame%d.png", i), buf.Bytes()}
	}
	return out
}
