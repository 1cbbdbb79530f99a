package review

import (
	"fmt"
	"math"
	"math/rand/v2"

	"sparsewatch/monitor"
)

// estimatedFrames builds the in-control frames for the "estimated"
// calibration: standard normal noise seen through a model learnt, with the
// same estimator, from n frames of the same noise. Each stream then carries
// the lasting error of its own estimated level and scale through the whole
// simulated run, as the real monitor does: the Phase I estimation effect on
// the in-control run length (Jensen, Jones-Farmer, Champ & Woodall 2006,
// Journal of Quality Technology 38(4), "Effects of parameter estimation on
// control chart properties: a literature review").
//
// Each stream's b noise values are centred and scaled to mean 0 and
// standard deviation 1 before the model is applied, so drawing frames with
// replacement adds no error of its own.
func estimatedFrames(m, n, b int, kind monitor.ModelKind, seed uint64) ([][]float32, error) {
	rng := rand.New(rand.NewPCG(seed, 0x5eed))
	lr, err := monitor.NewLearner(m, n, monitor.ModelOptions{Kind: kind, ScaleFloor: 1e-6})
	if err != nil {
		return nil, err
	}
	row := make([]float32, m)
	for j := 0; j < n; j++ {
		for i := range row {
			row[i] = float32(rng.NormFloat64())
		}
		if err := lr.Add(row); err != nil {
			return nil, err
		}
	}
	md, err := lr.Model()
	if err != nil {
		return nil, err
	}
	out := make([][]float32, b)
	for j := range out {
		out[j] = make([]float32, m)
		for i := range out[j] {
			out[j][i] = float32(rng.NormFloat64())
		}
	}
	for i := 0; i < m; i++ {
		var s, s2 float64
		for j := range out {
			v := float64(out[j][i])
			s += v
			s2 += v * v
		}
		mean := s / float64(b)
		sd := math.Sqrt(math.Max(s2/float64(b)-mean*mean, 1e-12))
		for j := range out {
			out[j][i] = float32((float64(out[j][i]) - mean) / sd)
		}
	}
	for j := range out {
		md.StandardizeFrame(out[j], out[j])
	}
	for j := range out {
		for _, v := range out[j] {
			if math.IsNaN(float64(v)) {
				return nil, fmt.Errorf("review: estimated calibration frame has a missing value")
			}
		}
	}
	return out, nil
}
