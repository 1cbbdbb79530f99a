package cli

import (
	"context"
	"fmt"

	"sparsewatch/frames"
	"sparsewatch/monitor"
	"sparsewatch/server/review"
)

// referenceBootstrap reads the first n good frames of dir (a folder or
// .zip) as k x k tile means, standardised with their own mean and sd: the
// frames a bootstrap calibration draws from, and the stream grid size.
func referenceBootstrap(dir string, k, n int) (boot [][]float32, gw, gh int, err error) {
	src, _, err := frames.Open(dir, frames.Options{})
	if err != nil {
		return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
	}
	defer src.Close()
	boot, t, err := review.BootstrapFrames(context.Background(), src, k, n, monitor.MeanSD, nil)
	if err != nil {
		return nil, 0, 0, fmt.Errorf("reference frames in %s: %w", dir, err)
	}
	return boot, t.GW, t.GH, nil
}
