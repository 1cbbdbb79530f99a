package frames

import (
	"archive/zip"
	"bytes"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func zipOf(t testing.TB, files map[string][]byte) []byte {
	var b bytes.Buffer
	zw := zip.NewWriter(&b)
	for name, data := range files {
		w, err := zw.Create(name)
		if err != nil {
			t.Fatal(err)
		}
		w.Write(data)
	}
	zw.Close()
	return b.Bytes()
}

// FuzzZip: no archive makes the zip intake panic, and every item is a
// frame or a named error.
func FuzzZip(f *testing.F) {
	good := greyPNG(f, 4, 4, 1)
	f.Add(zipOf(f, map[string][]byte{"a/frame1.png": good, "a/frame2.png": good[:30]}))
	f.Add(zipOf(f, map[string][]byte{"../evil.png": good, "x.fits": fitsFile(2, 2, func(i int) float32 { return float32(i) })}))
	f.Add([]byte("PK\x03\x04 not really"))
	f.Fuzz(func(t *testing.T, data []byte) {
		src, _, err := OpenZip(bytes.NewReader(data), int64(len(data)), Options{MaxPixels: 1 << 16, MaxFileBytes: 1 << 20})
		if err != nil {
			return
		}
		checkDrain(t, src)
	})
}

// FuzzFolder: a folder holding one fuzzed file beside two good frames
// still delivers both good frames, whatever the file's name and bytes.
func FuzzFolder(f *testing.F) {
	good := greyPNG(f, 4, 4, 1)
	f.Add("frame1.png", good[:40])
	f.Add("frame1.fits", fitsFile(4, 4, func(i int) float32 { return float32(i) }))
	f.Add("frame1.jpg", []byte{0xff, 0xd8, 0xff, 0xe0, 0, 2})
	f.Add("frame1.tif", []byte("II*\x00\x08\x00\x00\x00"))
	f.Add("frame1.gif", []byte("GIF89a"))
	f.Fuzz(func(t *testing.T, name string, data []byte) {
		if name == "" || len(name) > 100 || strings.ContainsAny(name, "/\x00") || name == "." || name == ".." ||
			name == "frame0.png" || name == "frame999.png" {
			return
		}
		dir := t.TempDir()
		os.WriteFile(filepath.Join(dir, "frame0.png"), good, 0o644)
		os.WriteFile(filepath.Join(dir, "frame999.png"), good, 0o644)
		if err := os.WriteFile(filepath.Join(dir, name), data, 0o644); err != nil {
			return
		}
		src, _, err := OpenFolder(dir, Options{MaxPixels: 1 << 16, MaxFileBytes: 1 << 20})
		if err != nil {
			t.Fatal(err)
		}
		goodSeen := 0
		for _, it := range checkDrain(t, src) {
			if it.Err == nil && (it.Name == "frame0.png" || it.Name == "frame999.png") {
				goodSeen++
			}
		}
		if goodSeen != 2 {
			t.Fatalf("good frames delivered: %d, want 2", goodSeen)
		}
	})
}

// FuzzImageStream: no byte stream makes the splitter panic or loop.
func FuzzImageStream(f *testing.F) {
	good := greyPNG(f, 4, 4, 1)
	f.Add(append(append([]byte{}, good...), good...))
	f.Add([]byte{0xff, 0xd8, 0xff, 0xda, 0, 2, 0xff, 0x00, 0xff, 0xd9})
	f.Fuzz(func(t *testing.T, data []byte) {
		checkDrain(t, NewImageStream(bytes.NewReader(data), "fuzz", Options{MaxPixels: 1 << 16, MaxFileBytes: 1 << 20}))
	})
}

// checkDrain reads src to the end: each item is a frame whose pixels can
// be read whole, or an error naming its item; the count is bounded.
func checkDrain(t *testing.T, src Source) []Item {
	t.Helper()
	defer src.Close()
	var items []Item
	var buf Frame
	for n := 0; ; n++ {
		if n > 1<<16 {
			t.Fatal("source does not end")
		}
		it, err := src.Next()
		if err == io.EOF {
			return items
		}
		if err != nil {
			return items
		}
		if it.Err != nil {
			if !strings.HasPrefix(it.Err.Error(), "frames: ") || !strings.Contains(it.Err.Error(), it.Name) {
				t.Fatalf("error %q does not name item %q", it.Err, it.Name)
			}
		} else {
			w, h := it.Pixels.Size()
			if int64(w)*int64(h) > 1<<16 {
				t.Fatalf("frame %dx%d past the pixel limit", w, h)
			}
			if _, _, err := Full(it, &buf); err != nil {
				it.Err = err
			}
		}
		items = append(items, it)
	}
}
