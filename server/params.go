package server

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"strings"

	"sparsewatch/monitor"
)

// Params are a session's parameters: the names of DEVELOPERS.md's session
// parameters, plus "pace" for the server. A PATCH decodes onto a copy of the
// current value, so absent fields keep theirs.
type Params struct {
	Budget          Budget  `json:"budget"`
	Policy          string  `json:"policy"`
	TopR            int     `json:"top_r"`
	Shift           float64 `json:"shift"`
	Compensation    float64 `json:"compensation"` // fraction of c_max
	Tile            int     `json:"tile"`
	ARL0            float64 `json:"arl0"`
	ReferenceFrames int     `json:"reference_frames"`
	Model           string  `json:"model"`
	Seed            uint64  `json:"seed"`
	// Calibration and Paths pass through to the review: the in-control
	// model the limit is calibrated on, and the number of simulated paths.
	Calibration string `json:"calibration,omitempty"`
	Paths       int    `json:"paths,omitempty"`
	// Limit, when > 0, is the control limit to use; calibration is skipped.
	Limit float64 `json:"limit,omitempty"`
	// Pace is the review speed in frames per second so a person can watch
	// an offline review; 0 reviews as fast as possible.
	Pace float64 `json:"pace"`
}

// DefaultPace is the offline review speed when params do not say.
const DefaultPace = 10

// DefaultParams returns the documented defaults.
func DefaultParams() Params {
	return Params{
		Budget: "3%", Policy: string(monitor.Adaptive), TopR: 10, Shift: 1,
		Compensation: 0.25, Tile: 1, ARL0: 10000, ReferenceFrames: 50,
		Model: string(monitor.SelfStart), Calibration: "estimated", Seed: 1, Pace: DefaultPace, // seed 1 as scan
	}
}

// Budget is "3%", "0.03" or a stream count "500"; JSON numbers are accepted too.
type Budget string

func (b *Budget) UnmarshalJSON(data []byte) error {
	data = bytes.TrimSpace(data)
	if len(data) > 0 && data[0] == '"' {
		var s string
		if err := json.Unmarshal(data, &s); err != nil {
			return err
		}
		*b = Budget(s)
		return nil
	}
	var f float64
	if err := json.Unmarshal(data, &f); err != nil {
		return fmt.Errorf("budget must be a string or a number")
	}
	*b = Budget(strconv.FormatFloat(f, 'g', -1, 64))
	return nil
}

// Streams returns the budget as a stream count out of m streams.
func (b Budget) Streams(m int) (int, error) {
	s := strings.TrimSpace(string(b))
	bad := fmt.Errorf("budget %q: want a percentage (3%%), a fraction (0.03) or a stream count (500)", s)
	var q float64
	switch {
	case strings.HasSuffix(s, "%"):
		f, err := strconv.ParseFloat(strings.TrimSuffix(s, "%"), 64)
		if err != nil {
			return 0, bad
		}
		q = f / 100 * float64(m)
	default:
		f, err := strconv.ParseFloat(s, 64)
		if err != nil {
			return 0, bad
		}
		if f > 0 && f < 1 {
			q = f * float64(m)
		} else {
			q = f
		}
	}
	n := int(q + 0.5)
	if q > 0 && n < 1 {
		n = 1
	}
	if n < 1 || n > m {
		return 0, fmt.Errorf("budget %q gives %d of %d streams; it must be between 1 and all of them", s, n, m)
	}
	return n, nil
}

// check validates the budget's form without knowing the stream count.
func (b Budget) check() error {
	s := strings.TrimSpace(string(b))
	f, err := strconv.ParseFloat(strings.TrimSuffix(s, "%"), 64)
	if err != nil || !(f > 0) || (strings.HasSuffix(s, "%") && f > 100) {
		return fmt.Errorf("budget %q: want a percentage (3%%), a fraction (0.03) or a stream count (500)", s)
	}
	return nil
}

// validateParams names the first bad field: the review's own checks plus
// the server's (pace, sizes a shared server should refuse).
func validateParams(p Params) error {
	if err := p.Budget.check(); err != nil {
		return errorf(KindInvalid, "params: %v", err)
	}
	if err := reviewParams(p).Validate(); err != nil {
		return errorf(KindInvalid, "params: %v", err)
	}
	switch {
	case p.ReferenceFrames > 100000:
		return errorf(KindInvalid, "params: reference_frames %d must be at most 100000", p.ReferenceFrames)
	case p.ARL0 > 1e12:
		return errorf(KindInvalid, "params: arl0 %v must be at most 1e12 frames", p.ARL0)
	case p.Paths > 100000:
		return errorf(KindInvalid, "params: paths %d must be at most 100000", p.Paths)
	case !(p.Pace >= 0) || p.Pace > 10000:
		return errorf(KindInvalid, "params: pace %v must be frames per second in [0, 10000] (0 = as fast as possible)", p.Pace)
	}
	return nil
}

// decodeParams decodes a partial params object onto base and validates it.
func decodeParams(base Params, data []byte) (Params, error) {
	p := base
	if len(bytes.TrimSpace(data)) == 0 {
		return p, nil
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&p); err != nil {
		return base, errorf(KindInvalid, "params: %v", err)
	}
	if err := validateParams(p); err != nil {
		return base, err
	}
	return p, nil
}
