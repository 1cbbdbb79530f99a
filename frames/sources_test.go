package frames

import (
	"archive/zip"
	"bytes"
	"errors"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"sparsewatch/frames/fits"
)

func greyPNG(t testing.TB, w, h int, v uint8) []byte {
	t.Helper()
	img := image.NewGray(image.Rect(0, 0, w, h))
	for i := range img.Pix {
		img.Pix[i] = v + uint8(i%3)
	}
	var b bytes.Buffer
	if err := png.Encode(&b, img); err != nil {
		t.Fatal(err)
	}
	return b.Bytes()
}

// fitsFile builds a w x h BITPIX = -32 FITS file per FITS Standard 4.0
// (80-character cards, END, blocks of 2880 bytes); vals gives pixel i.
func fitsFile(w, h int, val func(i int) float32) []byte {
	var b bytes.Buffer
	for _, c := range []string{
		fmt.Sprintf("%-8s= %20s", "SIMPLE", "T"), fmt.Sprintf("%-8s= %20d", "BITPIX", -32),
		fmt.Sprintf("%-8s= %20d", "NAXIS", 2), fmt.Sprintf("%-8s= %20d", "NAXIS1", w),
		fmt.Sprintf("%-8s= %20d", "NAXIS2", h), "END",
	} {
		fmt.Fprintf(&b, "%-80s", c)
	}
	for b.Len()%2880 != 0 {
		b.WriteByte(' ')
	}
	for i := 0; i < w*h; i++ {
		u := math.Float32bits(val(i))
		b.Write([]byte{byte(u >> 24), byte(u >> 16), byte(u >> 8), byte(u)})
	}
	for b.Len()%2880 != 0 {
		b.WriteByte(0)
	}
	return b.Bytes()
}

type badCase struct {
	file string
	data []byte
	want string // substring of the item's error; "" = a good frame
	as   func(error) bool
}

func isFormat(err error) bool { var e FormatError; return errors.As(err, &e) }
func isTooLarge(err error) bool {
	var e *TooLargeError
	return errors.As(err, &e)
}
func isMismatch(err error) bool {
	var e *SizeMismatchError
	return errors.As(err, &e)
}
func isUnsafe(err error) bool {
	var e *UnsafePathError
	return errors.As(err, &e)
}
func isFITSFormat(err error) bool { var e fits.FormatError; return errors.As(err, &e) }

// badInputs is the table of bad files from the issue, between good frames.
func badInputs(t testing.TB) []badCase {
	good := greyPNG(t, 8, 6, 10)
	nan := float32(math.NaN())
	fitsGood := fitsFile(8, 6, func(i int) float32 { return float32(i) })
	return []badCase{
		{"frame0.png", good, "", nil},
		{"frame1.png", good[:len(good)/2], "truncated", isFormat},
		{"frame2.png", nil, "empty file", isFormat},
		{"frame3.png", []byte("this is a text file, not a picture\n"), "not an image", isFormat},
		{"frame4.png", hugePNGHeader(100000, 100000), "exceeds the", isTooLarge},
		{"frame5.png", greyPNG(t, 16, 16, 3), "16x16 but the sequence is 8x6", isMismatch},
		{"frame6.fits", fitsGood[:len(fitsGood)-100], "2880-byte blocks", isFITSFormat},
		{"frame7.fits", fitsFile(8, 6, func(int) float32 { return nan }), "", nil}, // all missing: see TestAllMissing
		{"frame8.png", good, "", nil},
		{"frame9.fits", fitsGood, "", nil},
		{"frame10.png", good, "", nil},
	}
}

func drain(t testing.TB, src Source) []Item {
	t.Helper()
	var items []Item
	for {
		it, err := src.Next()
		if err == io.EOF {
			return items
		}
		if err != nil {
			t.Fatalf("Next: %v", err)
		}
		// Keep a copy of the frame: the source reuses its buffer.
		if it.Err == nil {
			f, _, err := Full(it, &Frame{})
			if err != nil {
				t.Fatalf("%s: Full: %v", it.Name, err)
			}
			it.Frame = &Frame{Width: f.Width, Height: f.Height, Stride: f.Stride, Pix: append([]float32(nil), f.Pix...)}
		}
		items = append(items, it)
	}
}

func checkItems(t *testing.T, items []Item, cases []badCase) {
	t.Helper()
	if len(items) != len(cases) {
		names := []string{}
		for _, it := range items {
			names = append(names, it.Name)
		}
		t.Fatalf("got %d items %v, want %d", len(items), names, len(cases))
	}
	for i, tc := range cases {
		it := items[i]
		if it.Index != i || it.Name != tc.file {
			t.Errorf("item %d is %d %q, want %q", i, it.Index, it.Name, tc.file)
		}
		if tc.want == "" {
			if it.Err != nil {
				t.Errorf("%s: unexpected error %v", tc.file, it.Err)
			} else if it.Frame.Width != 8 || it.Frame.Height != 6 {
				t.Errorf("%s: frame %dx%d", tc.file, it.Frame.Width, it.Frame.Height)
			}
			continue
		}
		if it.Err == nil {
			t.Errorf("%s: no error, want %q", tc.file, tc.want)
			continue
		}
		msg := it.Err.Error()
		if !strings.Contains(msg, tc.want) || !strings.Contains(msg, tc.file) || !strings.HasPrefix(msg, "frames: ") {
			t.Errorf("%s: error %q, want it to name the file and contain %q", tc.file, msg, tc.want)
		}
		var fe *FileError
		if !errors.As(it.Err, &fe) || fe.Name != tc.file {
			t.Errorf("%s: error is not a FileError naming the file", tc.file)
		}
		if tc.as != nil && !tc.as(it.Err) {
			t.Errorf("%s: error %q is not of the expected type", tc.file, msg)
		}
	}
}

func TestFolderBadInputs(t *testing.T) {
	dir := t.TempDir()
	cases := badInputs(t)
	for _, tc := range cases {
		if err := os.WriteFile(filepath.Join(dir, tc.file), tc.data, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	os.WriteFile(filepath.Join(dir, "truth.json"), []byte("{}"), 0o644)
	os.WriteFile(filepath.Join(dir, ".hidden.png"), []byte("x"), 0o644)
	src, lst, err := OpenFolder(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	if len(lst.Skipped) != 1 || lst.Skipped[0] != "truth.json" {
		t.Errorf("skipped %v, want [truth.json]", lst.Skipped)
	}
	if src.Len() != len(cases) {
		t.Errorf("Len %d, want %d", src.Len(), len(cases))
	}
	items := drain(t, src)
	checkItems(t, items, cases)
	// The FITS frame in a folder is read from disk on demand, with honest counts.
	if got := items[9].Frame.At(3, 2); got != 19 {
		t.Errorf("frame9.fits pixel (3,2) = %v, want 19", got)
	}
	if items[9].Bytes != 2880 {
		t.Errorf("frame9.fits item took %d bytes, want the 2880-byte header only", items[9].Bytes)
	}
}

func TestZipBadInputsAndZipSlip(t *testing.T) {
	cases := badInputs(t)
	var b bytes.Buffer
	zw := zip.NewWriter(&b)
	add := func(name string, data []byte) {
		w, err := zw.CreateHeader(&zip.FileHeader{Name: name, Method: zip.Deflate})
		if err != nil {
			t.Fatal(err)
		}
		w.Write(data)
	}
	for _, tc := range cases {
		add("frames/"+tc.file, tc.data)
	}
	good := greyPNG(t, 8, 6, 10)
	add("../frame11.png", good)
	add("/etc/frame12.png", good)
	add("frames/..\\..\\frame13.png", good)
	add("frames/readme.txt", []byte("hi"))
	zw.Close()
	src, lst, err := OpenZip(bytes.NewReader(b.Bytes()), int64(b.Len()), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if len(lst.Skipped) != 1 {
		t.Errorf("skipped %v", lst.Skipped)
	}
	var want []badCase
	for _, tc := range cases {
		tc.file = "frames/" + tc.file
		want = append(want, tc)
	}
	items := drain(t, src)
	// Unsafe entries come in natural order with the rest; pick them out.
	var rest []Item
	unsafe := 0
	for _, it := range items {
		if it.Err != nil && isUnsafe(it.Err) {
			unsafe++
			if !strings.Contains(it.Err.Error(), "escapes its folder") {
				t.Errorf("unsafe entry error %q", it.Err)
			}
			continue
		}
		rest = append(rest, it)
	}
	if unsafe != 3 {
		t.Errorf("%d unsafe entries refused, want 3", unsafe)
	}
	for i := range rest {
		rest[i].Index = i // indices count the refused entries too
	}
	checkItems(t, rest, want)
}

func TestSafeEntryName(t *testing.T) {
	for name, want := range map[string]bool{
		"a.png": true, "dir/a.png": true, "dir/": true, "./a.png": true,
		"../a.png": false, "dir/../../a.png": false, "/a.png": false, `..\a.png`: false,
		"C:/a.png": false, "": false, "a/../b.png": false,
	} {
		if got := SafeEntryName(name); got != want {
			t.Errorf("SafeEntryName(%q) = %v, want %v", name, got, want)
		}
	}
}

func TestAllMissing(t *testing.T) {
	dir := t.TempDir()
	os.WriteFile(filepath.Join(dir, "a.fits"), fitsFile(4, 4, func(int) float32 { return float32(math.NaN()) }), 0o644)
	src, _, err := OpenFolder(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	items := drain(t, src)
	err = CheckAnyValid(items[0].Frame)
	var am *AllMissingError
	if !errors.As(err, &am) || !strings.Contains(err.Error(), "every pixel") {
		t.Fatalf("all-NaN frame: %v, want an AllMissingError", err)
	}
}

func TestNaturalSort(t *testing.T) {
	names := []string{"frame10.png", "frame2.png", "frame1.png", "frame02b.png", "Frame3.png", "frame100.png", "frame2a.png"}
	SortNatural(names)
	want := "Frame3.png frame1.png frame2.png frame2a.png frame02b.png frame10.png frame100.png"
	if got := strings.Join(names, " "); got != want {
		t.Errorf("got  %s\nwant %s", got, want)
	}
}

func TestImageStream(t *testing.T) {
	var b bytes.Buffer
	b.Write(greyPNG(t, 8, 6, 1))
	g := image.NewGray(image.Rect(0, 0, 8, 6))
	for i := range g.Pix {
		g.Pix[i] = 200
	}
	jpeg.Encode(&b, g, &jpeg.Options{Quality: 90})
	b.WriteString("garbage between images")
	b.Write(greyPNG(t, 8, 6, 50))
	b.Write(greyPNG(t, 4, 4, 50)) // wrong size
	c := image.NewRGBA(image.Rect(0, 0, 8, 6))
	for i := range c.Pix {
		c.Pix[i] = uint8(i * 7)
	}
	c.Set(0, 0, color.RGBA{255, 0, 0, 255})
	jpeg.Encode(&b, c, nil) // colour JPEG with restart-free entropy data
	last := greyPNG(t, 8, 6, 9)
	b.Write(last[:len(last)-5]) // truncated at the end
	items := drain(t, NewImageStream(bytes.NewReader(b.Bytes()), "stdin", Options{}))
	want := []string{"", "", "start no PNG or JPEG", "", "4x4 but the sequence is 8x6", "", "truncated"}
	if len(items) != len(want) {
		for _, it := range items {
			t.Log(it.Name, it.Err)
		}
		t.Fatalf("%d items, want %d", len(items), len(want))
	}
	for i, w := range want {
		it := items[i]
		if it.Name != fmt.Sprintf("stdin#%d", i) {
			t.Errorf("item %d named %q", i, it.Name)
		}
		if w == "" {
			if it.Err != nil {
				t.Errorf("item %d: %v", i, it.Err)
			}
			continue
		}
		if it.Err == nil || !strings.Contains(it.Err.Error(), w) {
			t.Errorf("item %d: error %v, want %q", i, it.Err, w)
		}
	}
	if v := items[1].Frame.At(3, 3); math.Abs(float64(v)-200) > 2 {
		t.Errorf("JPEG pixel %v, want about 200", v)
	}
	if v := items[3].Frame.At(0, 0); v != 50 {
		t.Errorf("PNG after garbage pixel %v, want 50", v)
	}
}

func TestTiler(t *testing.T) {
	f := NewFrame(5, 3)
	for i := range f.Pix {
		f.Pix[i] = float32(i)
	}
	f.Pix[0] = float32(math.NaN())
	tl, err := NewTiler(5, 3, 2)
	if err != nil {
		t.Fatal(err)
	}
	if tl.GW != 3 || tl.GH != 2 {
		t.Fatalf("grid %dx%d, want 3x2", tl.GW, tl.GH)
	}
	all := make([]float32, tl.Streams())
	tl.Means(f, all)
	// Tile (0,0) holds pixels 0(NaN),1,5,6 -> (1+5+6)/3; tile (2,0) holds 4,9;
	// tile (2,1) holds 14 only.
	want := []float32{4, (2 + 3 + 7 + 8) / 4.0, (4 + 9) / 2.0, (10 + 11) / 2.0, (12 + 13) / 2.0, 14}
	for i := range want {
		if math.Abs(float64(all[i]-want[i])) > 1e-5 {
			t.Errorf("stream %d = %v, want %v", i, all[i], want[i])
		}
	}
	// Reading through a storage reader gives the same means, and asks only
	// for the tiles' pixels, in ascending order.
	rec := &recReader{f: f}
	idx := []int32{0, 2, 5}
	dst := make([]float32, 3)
	if _, err := tl.Read(rec, idx, dst); err != nil {
		t.Fatal(err)
	}
	for k, i := range idx {
		if math.Abs(float64(dst[k]-want[i])) > 1e-5 {
			t.Errorf("Read stream %d = %v, want %v", i, dst[k], want[i])
		}
	}
	if got := fmt.Sprint(rec.asked); got != "[0 1 4 5 6 9 14]" {
		t.Errorf("asked for pixels %s", got)
	}
	if n := tl.PixelsPerStream(idx); n != 7 {
		t.Errorf("PixelsPerStream %d, want 7", n)
	}
	if got := tl.PixelBox(1, 0, 2, 1); got != [4]int{2, 0, 4, 2} {
		t.Errorf("PixelBox %v", got)
	}
	// A tile with no valid pixel is missing.
	g := NewFrame(2, 2)
	for i := range g.Pix {
		g.Pix[i] = float32(math.NaN())
	}
	t2, _ := NewTiler(2, 2, 2)
	one := make([]float32, 1)
	t2.Means(g, one)
	if !math.IsNaN(float64(one[0])) {
		t.Errorf("all-NaN tile mean %v, want NaN", one[0])
	}
}

type recReader struct {
	f     *Frame
	asked []int32
}

func (r *recReader) Size() (int, int) { return r.f.Width, r.f.Height }
func (r *recReader) ReadPixels(idx []int32, dst []float32) (int64, error) {
	r.asked = append(r.asked, idx...)
	return r.f.ReadPixels(idx, dst)
}

func TestSynthetic(t *testing.T) {
	sp := Synthetic{Width: 20, Height: 10, Frames: 4, Level: 100, Noise: 2, Seed: 7, ChangeFrame: 2, CX: 5, CY: 5, Radius: 2, Delta: 1000}
	src, _ := NewSynthetic(sp)
	items := drain(t, src)
	if len(items) != 4 {
		t.Fatalf("%d frames", len(items))
	}
	if items[1].Frame.At(5, 5) > 200 || items[2].Frame.At(5, 5) < 900 {
		t.Errorf("change not where it should be: %v %v", items[1].Frame.At(5, 5), items[2].Frame.At(5, 5))
	}
	var again Frame
	sp.Render(3, &again)
	if again.At(7, 7) != items[3].Frame.At(7, 7) {
		t.Error("Render is not repeatable")
	}
}

func TestPrefetchSameItems(t *testing.T) {
	dir := t.TempDir()
	cases := badInputs(t)
	for _, tc := range cases {
		os.WriteFile(filepath.Join(dir, tc.file), tc.data, 0o644)
	}
	src, _, err := OpenFolder(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	checkItems(t, drain(t, Prefetch(src, 2)), cases)
	// Closing early stops the read-ahead goroutine without a hang.
	src2, _, _ := OpenFolder(dir, Options{})
	p := Prefetch(src2, 3)
	p.Next()
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}
}
