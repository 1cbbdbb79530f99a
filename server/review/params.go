// Package review runs the offline and session pipeline: a frame source,
// reference learning, calibration of the control limit, the engine loop
// and a report, with hooks so a command or a server session can watch
// each frame go by.
package review

import (
	"fmt"
	"math"
	"strconv"
	"strings"

	"sparsewatch/monitor"
)

// Params are the session parameters of DEVELOPERS.md ("Session
// parameters"), under the same JSON names, plus a few run settings.
type Params struct {
	Budget          string  `json:"budget"`       // "3%", "0.03" or a stream count "500"
	Policy          string  `json:"policy"`       // adaptive|thompson|spatial|random|stride|full
	TopR            int     `json:"top_r"`        // local statistics summed into G
	Shift           float64 `json:"shift"`        // design shift d in noise units
	Compensation    float64 `json:"compensation"` // fraction of c_max
	Tile            int     `json:"tile"`         // k x k tile means as streams
	ARL0            float64 `json:"arl0"`         // target in-control run length, frames
	ReferenceFrames int     `json:"reference_frames"`
	Model           string  `json:"model"` // self-start|robust|normal-score|mean-sd
	Seed            uint64  `json:"seed"`

	// Limit, when > 0, is used as the control limit and calibration is
	// skipped (a resumed session, a test).
	Limit float64 `json:"limit,omitempty"`
	// Calibration picks the in-control model the limit is calibrated on:
	// "estimated" (the default: N(0,1) noise seen through a model estimated
	// from as many reference frames, so each stream keeps its own lasting
	// estimation error), "normal" (independent N(0,1), as if the model were
	// known exactly) or "bootstrap" (the user's own standardised reference
	// frames drawn with replacement).
	Calibration string `json:"calibration,omitempty"`
	// Paths is the number of simulated calibration paths (0 = monitor's
	// default); as many again, halved, verify the limit.
	Paths int `json:"paths,omitempty"`
	// Work caps the stream reads the calibration simulates per stage
	// (0 = DefaultWork); beyond it the limit is found by tail extrapolation.
	Work float64 `json:"work,omitempty"`
	// Burnin is the frames simulated before calibration run lengths are
	// counted (0 = the calibrator's steady-state default).
	Burnin int `json:"burnin,omitempty"`
}

// DefaultWork is the review's default cap on simulated stream reads per
// calibration stage: a few seconds of one core, so a scan does not spend
// longer calibrating than reading.
const DefaultWork = 5e8

// DefaultParams returns the documented defaults.
func DefaultParams() Params {
	return Params{Budget: "3%", Policy: string(monitor.Adaptive), TopR: 10, Shift: 1, Compensation: 0.25,
		Tile: 1, ARL0: 10000, ReferenceFrames: 50, Model: string(monitor.SelfStart), Calibration: "estimated"}
}

// ParseBudget reads "3%", "0.03" (a fraction below 1) or "500" (a stream
// count) as monitor.BudgetStreams takes it: a fraction or a count.
func ParseBudget(s string) (float64, error) {
	t := strings.TrimSpace(s)
	bad := fmt.Errorf("budget %q: want a percentage (3%%), a fraction (0.03) or a stream count (500)", s)
	if strings.HasSuffix(t, "%") {
		f, err := strconv.ParseFloat(strings.TrimSpace(strings.TrimSuffix(t, "%")), 64)
		if err != nil || !(f > 0) || f > 100 {
			return 0, bad
		}
		if f == 100 {
			return 1, nil
		}
		return f / 100, nil
	}
	f, err := strconv.ParseFloat(t, 64)
	if err != nil || !(f > 0) || math.IsInf(f, 0) {
		return 0, bad
	}
	return f, nil
}

// Streams returns the budget as a stream count out of m.
func (p Params) Streams(m int) (int, error) {
	b, err := ParseBudget(p.Budget)
	if err != nil {
		return 0, err
	}
	if b == 1 && strings.HasSuffix(strings.TrimSpace(p.Budget), "%") {
		return m, nil
	}
	q, err := monitor.BudgetStreams(b, m)
	if err != nil {
		return 0, fmt.Errorf("budget %q: %v", p.Budget, strings.TrimPrefix(err.Error(), "monitor: "))
	}
	return q, nil
}

// Validate names the first bad field by its parameter name.
func (p Params) Validate() error {
	if _, err := ParseBudget(p.Budget); err != nil {
		return err
	}
	if pol, err := monitor.ParsePolicy(p.Policy); err != nil || pol == monitor.Oracle {
		return fmt.Errorf("policy %q unknown (choose adaptive, thompson, spatial, random, stride, full)", p.Policy)
	}
	switch {
	case p.TopR < 1:
		return fmt.Errorf("top_r %d must be at least 1", p.TopR)
	case !(p.Shift > 0) || math.IsInf(p.Shift, 0):
		return fmt.Errorf("shift %v must be a number > 0", p.Shift)
	case !(p.Compensation >= 0) || p.Compensation >= 1:
		return fmt.Errorf("compensation %v must be a fraction of c_max in [0,1)", p.Compensation)
	case p.Tile < 1 || p.Tile > 1024:
		return fmt.Errorf("tile %d must be between 1 and 1024", p.Tile)
	case p.Limit <= 0 && (!(p.ARL0 >= 2) || math.IsInf(p.ARL0, 0)):
		return fmt.Errorf("arl0 %v must be a number of frames >= 2", p.ARL0)
	case p.ReferenceFrames < 2:
		return fmt.Errorf("reference_frames %d must be at least 2", p.ReferenceFrames)
	case p.Limit < 0 || math.IsNaN(p.Limit) || math.IsInf(p.Limit, 0):
		return fmt.Errorf("limit %v must be a finite number >= 0", p.Limit)
	case p.Paths < 0:
		return fmt.Errorf("paths %d must be >= 0", p.Paths)
	case p.Burnin < 0:
		return fmt.Errorf("burnin %d must be >= 0", p.Burnin)
	case p.Work < 0 || math.IsNaN(p.Work):
		return fmt.Errorf("work %v must be >= 0", p.Work)
	}
	switch monitor.ModelKind(p.Model) {
	case monitor.Robust, monitor.NormalScore, monitor.MeanSD, monitor.SelfStart:
	default:
		return fmt.Errorf("model %q unknown (choose self-start, robust, normal-score or mean-sd)", p.Model)
	}
	switch p.Calibration {
	case "", "estimated", "normal", "bootstrap":
	default:
		return fmt.Errorf("calibration %q unknown (choose estimated, normal or bootstrap)", p.Calibration)
	}
	return nil
}
