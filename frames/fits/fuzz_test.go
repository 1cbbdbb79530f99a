package fits

import (
	"bytes"
	"math"
	"testing"
)

// FuzzOpen checks that no input makes the reader panic or read out of
// bounds, and that reading single pixels agrees with reading a whole plane.
func FuzzOpen(f *testing.F) {
	f.Add(build(mandatory(16, 4, 3), be(make([]int16, 12))))
	f.Add(build(append(mandatory(16, 2, 2, 2), card("BZERO", 32768.0, ""), card("BLANK", 7, "")), be(make([]int16, 8))))
	f.Add(build(append(mandatory(-32, 3, 1), card("BSCALE", 2.0, "")), be(float32(1), float32(math.NaN()), float32(3))))
	f.Add(build(mandatory(64, 1, 2), be(int64(1), int64(-1))))
	f.Add(build(mandatory(8, 2, 2), []byte{1, 2, 3, 4})[:100])
	f.Fuzz(func(t *testing.T, data []byte) {
		fl, err := Open(bytes.NewReader(data), int64(len(data)), 1<<16)
		if err != nil {
			return
		}
		n := fl.Width * fl.Height
		if n <= 0 || int64(n) > 1<<16 {
			t.Fatalf("opened a %dx%d plane past the limit", fl.Width, fl.Height)
		}
		full := make([]float32, n)
		planes := fl.Planes
		if planes > 4 {
			planes = 4
		}
		idx := []int32{0, int32(n / 2), int32(n - 1)}
		dst := make([]float32, len(idx))
		for p := 0; p < planes; p++ {
			if _, err := fl.ReadPlane(p, full); err != nil {
				t.Fatalf("Open accepted the file but ReadPlane(%d) failed: %v", p, err)
			}
			if _, err := fl.ReadPixels(p, idx, dst); err != nil {
				t.Fatalf("ReadPixels: %v", err)
			}
			for k, i := range idx {
				if !same(dst[k], full[i]) {
					t.Fatalf("plane %d pixel %d: ReadPixels %v, ReadPlane %v", p, i, dst[k], full[i])
				}
			}
		}
	})
}
