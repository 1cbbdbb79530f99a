package review

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"

	"sparsewatch/frames"
	"sparsewatch/monitor"
)

// ErrTooFewReference: fewer than 2 good reference frames for a bootstrap.
var ErrTooFewReference = errors.New("too few good reference frames for a bootstrap")

// BootstrapFrames reads the first n good frames of src as k x k tile means
// and returns them standardised the way the review will score live frames:
// the pool a bootstrap calibration draws frames from (real noise, spatial
// correlation and slow drift). Bad, empty or differently sized frames are
// skipped. check, if not nil, may refuse the grid once the first frame
// fixed it.
//
// With the self-start model each frame is scored against the frames before
// it (the first few only start the model), as live frames are scored
// against all earlier ones: a drift the running means lag behind then
// shows in the pool as it will live. Standardised in sample instead, the
// pool had lighter tails than live scores and its limit held only half the
// ARL0 asked for on fresh furnace frames. Other models standardise in
// sample with the model learnt from all n frames.
func BootstrapFrames(ctx context.Context, src frames.Source, k, n int, kind monitor.ModelKind, check func(*frames.Tiler) error) ([][]float32, *frames.Tiler, error) {
	var (
		tiler *frames.Tiler
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
		} else if f.Width != tiler.W || f.Height != tiler.H {
			continue
		}
		v := make([]float32, tiler.Streams())
		tiler.Means(f, v)
		raw = append(raw, v)
	}
	if kind == monitor.SelfStart {
		pool, err := selfStartPool(raw)
		return pool, tiler, err
	}
	if len(raw) < 2 {
		return nil, nil, fmt.Errorf("%w: %d good frames", ErrTooFewReference, len(raw))
	}
	lr, err := monitor.NewLearner(tiler.Streams(), len(raw), monitor.ModelOptions{Kind: kind})
	if err != nil {
		return nil, nil, err
	}
	for _, v := range raw {
		if err := lr.Add(v); err != nil {
			return nil, nil, err
		}
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

// selfStartPool scores each frame of raw against the frames before it with
// a self-start model started on the first few (max(3, min(10, n/4))), in
// place, and returns the scored frames; NaN marks a missing value.
func selfStartPool(raw [][]float32) ([][]float32, error) {
	start := max(3, min(10, len(raw)/4))
	if len(raw) < start+2 {
		return nil, fmt.Errorf("%w: %d good frames (the self-start model needs %d)", ErrTooFewReference, len(raw), start+2)
	}
	m := len(raw[0])
	lr, err := monitor.NewLearner(m, start, monitor.ModelOptions{Kind: monitor.SelfStart})
	if err != nil {
		return nil, err
	}
	for _, v := range raw[:start] {
		if err := lr.Add(v); err != nil {
			return nil, err
		}
	}
	md, err := lr.Model()
	if err != nil {
		return nil, err
	}
	idx := make([]int32, m)
	for i := range idx {
		idx[i] = int32(i)
	}
	z, miss := make([]float32, m), make([]bool, m)
	pool := raw[start:]
	for _, v := range pool {
		md.Standardize(z, miss, idx, v)
		md.Learn(idx, v, miss)
		for i := range v {
			v[i] = z[i]
			if miss[i] {
				v[i] = float32(math.NaN())
			}
		}
	}
	return pool, nil
}
