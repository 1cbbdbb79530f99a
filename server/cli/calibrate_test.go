package cli

import (
	"bytes"
	"context"
	"encoding/json"
	"testing"

	"sparsewatch/frames"
)

// TestCalibrateReference: --reference takes the grid from the frames (here
// 20 x 16 pixels in 4 x 4 tiles: 5 x 4 streams) and calibrates on the
// bootstrap of their standardised values, saying so.
func TestCalibrateReference(t *testing.T) {
	dir := writeSynthetic(t, frames.Synthetic{Width: 20, Height: 16, Frames: 30, Level: 1000, Noise: 10, Seed: 3, ChangeFrame: -1})
	var out, errb bytes.Buffer
	err := runCalibrate(context.Background(), Env{Stdout: &out, Stderr: &errb},
		[]string{"--reference", dir, "--tile", "4", "--warmup", "25", "--budget", "20%", "--arl0", "100", "--paths", "20", "--json"})
	if err != nil {
		t.Fatalf("%v\n%s", err, errb.String())
	}
	var r struct {
		Width, Height int
		Model         string
		Limit         float64
	}
	if err := json.Unmarshal(out.Bytes(), &r); err != nil {
		t.Fatalf("%v: %s", err, out.String())
	}
	if r.Width != 5 || r.Height != 4 || r.Model != "bootstrap" || !(r.Limit > 0) {
		t.Fatalf("got %+v from %s; want a 5 x 4 grid, model bootstrap, a limit", r, out.String())
	}
	if err := runCalibrate(context.Background(), Env{Stdout: &out, Stderr: &errb}, []string{"--reference", t.TempDir()}); err == nil {
		t.Fatal("an empty reference folder gave no error")
	}
}
