package review

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"testing"

	"sparsewatch/frames"
	"sparsewatch/frames/fits"
)

// A folder of FITS files is read pixel by pixel: after the reference
// frames each frame costs its 2880-byte header plus 2 bytes for each of
// the q pixels the engine asked for, not the whole file.
func TestFITSBudgetedBytes(t *testing.T) {
	sp := frames.Synthetic{Width: 100, Height: 80, Frames: 40, Level: 1000, Noise: 10, Seed: 4, ChangeFrame: -1}
	dir := t.TempDir()
	var f frames.Frame
	for i := 0; i < sp.Frames; i++ {
		sp.Render(i, &f)
		out, err := os.Create(filepath.Join(dir, fmt.Sprintf("f%d.fits", i)))
		if err != nil {
			t.Fatal(err)
		}
		if err := fits.WriteUint16(out, f.Width, f.Height, f.Pix); err != nil {
			t.Fatal(err)
		}
		out.Close()
	}
	st, _ := os.Stat(filepath.Join(dir, "f0.fits"))
	for _, tile := range []int{1, 2} {
		src, _, err := frames.OpenFolder(dir, frames.Options{})
		if err != nil {
			t.Fatal(err)
		}
		p := DefaultParams()
		p.ReferenceFrames, p.Limit, p.Budget, p.Tile = 10, 1e6, "5%", tile
		rep, err := Run(context.Background(), src, p, Hooks{})
		if err != nil {
			t.Fatal(err)
		}
		pixPerFrame := int64(rep.Budget * tile * tile) // 100x80 splits into whole 2x2 tiles
		if rep.WatchPixelsRead != int64(rep.FramesWatched)*pixPerFrame {
			t.Errorf("tile %d: watched pixels %d, want %d", tile, rep.WatchPixelsRead, int64(rep.FramesWatched)*pixPerFrame)
		}
		want := int64(rep.FramesWatched) * (2880 + 2*pixPerFrame)
		if rep.WatchBytesRead != want {
			t.Errorf("tile %d: watched bytes %d, want %d (header + 2 bytes a pixel)", tile, rep.WatchBytesRead, want)
		}
		if perFrame := rep.WatchBytesRead / int64(rep.FramesWatched); perFrame*4 > st.Size() {
			t.Errorf("tile %d: %d bytes a frame of a %d-byte file", tile, perFrame, st.Size())
		}
		refWant := int64(10) * (2880 + 2*100*80) // header and data; the block padding is not read
		if rep.BytesRead-rep.WatchBytesRead != refWant {
			t.Errorf("tile %d: reference bytes %d, want %d (header and plane of each file)", tile, rep.BytesRead-rep.WatchBytesRead, refWant)
		}
	}
}
