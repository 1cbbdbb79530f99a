package review

import (
	"context"
	"errors"
	"fmt"
	"io"

	"sparsewatch/frames"
	"sparsewatch/monitor"
)

// ErrTooFewReference: fewer than 2 good reference frames for a bootstrap.
var ErrTooFewReference = errors.New("a bootstrap needs at least 2 good reference frames")

// BootstrapFrames reads the first n good frames of src as k x k tile means,
// learns a model of the given kind from them and returns them standardised
// with it: the pool a bootstrap calibration draws whole frames from (real
// noise and spatial correlation). Bad, empty or differently sized frames
// are skipped. check, if not nil, may refuse the grid once the first frame
// fixed it.
func BootstrapFrames(ctx context.Context, src frames.Source, k, n int, kind monitor.ModelKind, check func(*frames.Tiler) error) ([][]float32, *frames.Tiler, error) {
	var (
		tiler *frames.Tiler
		lr    *monitor.Learner
		full  frames.Frame
		raw   [][]float32
	)
	for len(raw) < n {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		it, err := src.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, nil, err
		}
		if it.Err != nil {
			continue
		}
		f, _, err := frames.Full(it, &full)
		if err != nil || frames.CheckAnyValid(f) != nil {
			continue
		}
		if tiler == nil {
			if tiler, err = frames.NewTiler(f.Width, f.Height, k); err != nil {
				return nil, nil, err
			}
			if check != nil {
				if err := check(tiler); err != nil {
					return nil, nil, err
				}
			}
			if lr, err = monitor.NewLearner(tiler.Streams(), n, monitor.ModelOptions{Kind: kind}); err != nil {
				return nil, nil, err
			}
		} else if f.Width != tiler.W || f.Height != tiler.H {
			continue
		}
		v := make([]float32, tiler.Streams())
		tiler.Means(f, v)
		if err := lr.Add(v); err != nil {
			return nil, nil, err
		}
		raw = append(raw, v)
	}
	if len(raw) < 2 {
		return nil, nil, fmt.Errorf("%w: %d good frames", ErrTooFewReference, len(raw))
	}
	md, err := lr.Model()
	if err != nil {
		return nil, nil, err
	}
	for _, v := range raw {
		md.StandardizeFrame(v, v)
	}
	return raw, tiler, nil
}
