package cli

import (
	"errors"
	"fmt"
	"io"

	"sparsewatch/frames"
	"sparsewatch/monitor"
)

// referenceBootstrap reads the first n good frames of dir (a folder or
// .zip), as k x k tile means, learns each stream's mean and sd from them
// and returns them standardised: the frames a bootstrap calibration draws
// from (real noise and spatial correlation), and the stream grid size.
func referenceBootstrap(dir string, k, n int) (boot [][]float32, gw, gh int, err error) {
	src, _, err := frames.Open(dir, frames.Options{})
	if err != nil {
		return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
	}
	defer src.Close()
	var (
		tiler *frames.Tiler
		lr    *monitor.Learner
		full  frames.Frame
		raw   [][]float32
	)
	for len(raw) < n {
		it, err := src.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
		}
		if it.Err != nil {
			continue // a bad file is skipped, as scan does
		}
		f, _, err := frames.Full(it, &full)
		if err != nil {
			continue
		}
		if tiler == nil {
			if tiler, err = frames.NewTiler(f.Width, f.Height, k); err != nil {
				return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
			}
			if lr, err = monitor.NewLearner(tiler.Streams(), n, monitor.ModelOptions{Kind: monitor.MeanSD}); err != nil {
				return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
			}
		} else if f.Width != tiler.W || f.Height != tiler.H {
			continue
		}
		v := make([]float32, tiler.Streams())
		tiler.Means(f, v)
		if err := lr.Add(v); err != nil {
			return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
		}
		raw = append(raw, v)
	}
	if len(raw) < 2 {
		return nil, 0, 0, fmt.Errorf("reference frames: %s has %d good frames, need at least 2", dir, len(raw))
	}
	md, err := lr.Model()
	if err != nil {
		return nil, 0, 0, fmt.Errorf("reference frames: %w", err)
	}
	for _, v := range raw {
		md.StandardizeFrame(v, v)
	}
	return raw, tiler.GW, tiler.GH, nil
}
