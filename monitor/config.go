package monitor

import (
	"fmt"
	"math"
)

// Policy names a sampling policy: which q streams to read at the next frame.
type Policy string

// The sampling policies (METHODS.md section 4). Oracle is for simulation only:
// it needs Config.Oracle, the set of truly changed streams.
const (
	Adaptive Policy = "adaptive" // read the q largest local statistics, compensate the rest
	Thompson Policy = "thompson" // read the q largest Gamma(eps+L, 1) draws
	Spatial  Policy = "spatial"  // pooled window CUSUMs beside the per-stream ones; follow-up reads in hot windows
	Random   Policy = "random"   // q streams uniformly at random
	Stride   Policy = "stride"   // every stream on every k-th frame, k = ceil(m/q)
	Full     Policy = "full"     // every stream, every frame
	Oracle   Policy = "oracle"   // exactly the changed streams (simulation bound)
)

// Policies lists every policy a user may pick (Oracle excluded).
var Policies = []Policy{Adaptive, Thompson, Spatial, Random, Stride, Full}

// ParsePolicy returns the policy named s, or an error listing the choices.
func ParsePolicy(s string) (Policy, error) {
	for _, p := range append(Policies, Oracle) {
		if string(p) == s {
			return p, nil
		}
	}
	return "", fmt.Errorf("monitor: policy %q unknown (choose adaptive, thompson, spatial, random, stride, full)", s)
}

// Config is everything an Engine needs. The zero values of the optional
// fields select the documented defaults (see Defaults).
type Config struct {
	Width, Height int     // stream grid; m = Width*Height streams, index y*Width+x
	Budget        int     // q: streams read per frame, 1 <= q <= m
	TopR          int     // r: local statistics summed into G, 1 <= r <= m
	Shift         float64 // d: design shift in noise units (default 1)
	Policy        Policy  // default Adaptive

	// Compensation c added to U and D of every unread stream each frame.
	// CompFraction sets it as a fraction of the stability ceiling
	// c_max = q d^2 / (2 (m - q)); Compensation, when > 0, sets it directly.
	CompFraction float64 // default 0.25
	Compensation float64

	Limit float64 // h: alarm when G >= h; 0 means not calibrated (never alarms)
	// An episode ends when G falls below base + Hysteresis*(h - base), where
	// base is the engine's running in-control level of G (default 0.5).
	// The top-r sum of many streams never sits near zero in control, so a
	// level of a fraction of h alone could lie below it and keep the
	// episode on for good.
	Hysteresis float64
	Restart    bool // reset every statistic after an alarm instead of hysteresis

	// Spatial policy (see windowSet and planSpatial): SpatialWindow x
	// SpatialWindow windows every SpatialStride streams (defaults 7 and 2);
	// a window is hot when its statistic reaches SpatialHot (default 3);
	// hot windows get up to SpatialFollow reads each (default 12) within
	// SpatialShare x q reads a frame (default 0.35); G is
	// max(top-r sum, SpatialScale x largest window statistic), one limit
	// calibrated on it jointly (default scale 0.6 r). The scale only sets
	// how the false alarms split between the two parts; the calibration
	// is honest for any value. The default is measured, not derived: at
	// 128 x 128, 3% budget, r = 10, the maxima over 1000 in-control frames
	// (after a 1000-frame burn-in, 16 paths) had medians 69.2 (top-r sum)
	// and 11.3 (window), a ratio of 6.1, so either part alone would alarm
	// at about the same rate.
	SpatialWindow, SpatialStride int
	SpatialHot, SpatialShare     float64
	SpatialFollow                int
	SpatialScale                 float64
	ThompsonEps                  float64 // eps in Gamma(eps+L,1) for thompson (default 1)

	FirstFrame int     // frame index reported for the first Step (e.g. after reference frames)
	Seed       uint64  // random source for random/thompson/stride phase
	Oracle     []int32 // changed streams, for the oracle policy only
}

// Streams returns m.
func (c Config) Streams() int { return c.Width * c.Height }

// CompMax returns the stability ceiling c_max = q d^2 / (2 (m - q)) of the
// compensation (METHODS.md section 4); +Inf when every stream is read.
func (c Config) CompMax() float64 {
	m, q := c.Streams(), c.Budget
	if q >= m {
		return math.Inf(1)
	}
	return float64(q) * c.Shift * c.Shift / (2 * float64(m-q))
}

// Defaults returns c with every unset optional field filled in.
func (c Config) Defaults() Config {
	if c.Shift == 0 {
		c.Shift = 1
	}
	if c.Policy == "" {
		c.Policy = Adaptive
	}
	if c.CompFraction == 0 && c.Compensation == 0 {
		c.CompFraction = 0.25
	}
	if c.Hysteresis == 0 {
		c.Hysteresis = 0.5
	}
	if c.SpatialWindow == 0 {
		c.SpatialWindow = 7
	}
	if c.SpatialStride == 0 {
		c.SpatialStride = 2
	}
	if c.SpatialHot == 0 {
		c.SpatialHot = 3
	}
	if c.SpatialShare == 0 {
		c.SpatialShare = 0.35
	}
	if c.SpatialFollow == 0 {
		c.SpatialFollow = 12
	}
	if c.SpatialScale == 0 {
		c.SpatialScale = 0.6 * float64(max(c.TopR, 1))
	}
	if c.ThompsonEps == 0 {
		c.ThompsonEps = 1
	}
	return c
}

// Comp returns the absolute compensation c the engine will use.
func (c Config) Comp() float64 {
	if c.Compensation > 0 {
		return c.Compensation
	}
	if c.Budget >= c.Streams() {
		return 0
	}
	return c.CompFraction * c.CompMax()
}

// Validate reports the first bad field of c (after Defaults) by name.
func (c Config) Validate() error {
	m := c.Streams()
	switch {
	case c.Width <= 0 || c.Height <= 0:
		return fmt.Errorf("monitor: grid %dx%d is empty (width and height must be >= 1)", c.Width, c.Height)
	case c.Budget < 1:
		return fmt.Errorf("monitor: budget %d must be at least 1", c.Budget)
	case c.Budget > m:
		return fmt.Errorf("monitor: budget %d exceeds the %d streams", c.Budget, m)
	case c.TopR < 1:
		return fmt.Errorf("monitor: top-r %d must be at least 1", c.TopR)
	case c.TopR > m:
		return fmt.Errorf("monitor: top-r %d exceeds the %d streams", c.TopR, m)
	case !(c.Shift > 0) || math.IsInf(c.Shift, 0):
		return fmt.Errorf("monitor: shift %v must be a finite number > 0", c.Shift)
	case c.Compensation < 0 || math.IsNaN(c.Compensation) || c.CompFraction < 0 || math.IsNaN(c.CompFraction):
		return fmt.Errorf("monitor: compensation must be >= 0")
	case c.Budget < m && c.Comp() >= c.CompMax():
		return fmt.Errorf("monitor: compensation %.4g is at or above its ceiling c_max = %.4g (q d^2 / 2(m-q)); every statistic would climb", c.Comp(), c.CompMax())
	case c.Limit < 0 || math.IsNaN(c.Limit) || math.IsInf(c.Limit, 0):
		return fmt.Errorf("monitor: limit %v must be a finite number >= 0", c.Limit)
	case c.Hysteresis < 0 || c.Hysteresis > 1:
		return fmt.Errorf("monitor: hysteresis %v must be in [0,1]", c.Hysteresis)
	case c.SpatialWindow < 1 || c.SpatialStride < 1 || c.SpatialFollow < 1:
		return fmt.Errorf("monitor: spatial window %d, stride %d and follow-up reads %d must be >= 1", c.SpatialWindow, c.SpatialStride, c.SpatialFollow)
	case c.SpatialStride > c.SpatialWindow:
		return fmt.Errorf("monitor: spatial stride %d exceeds the window %d (streams between windows would be in none)", c.SpatialStride, c.SpatialWindow)
	case !(c.SpatialHot > 0) || math.IsInf(c.SpatialHot, 0):
		return fmt.Errorf("monitor: spatial hot level %v must be a finite number > 0", c.SpatialHot)
	case !(c.SpatialShare >= 0 && c.SpatialShare <= 1):
		return fmt.Errorf("monitor: spatial share %v must be in [0,1]", c.SpatialShare)
	case !(c.SpatialScale > 0) || math.IsInf(c.SpatialScale, 0):
		return fmt.Errorf("monitor: spatial scale %v must be a finite number > 0", c.SpatialScale)
	case c.ThompsonEps <= 0:
		return fmt.Errorf("monitor: thompson eps %v must be > 0", c.ThompsonEps)
	}
	if _, err := ParsePolicy(string(c.Policy)); err != nil {
		return err
	}
	if c.Policy == Oracle {
		if len(c.Oracle) == 0 {
			return fmt.Errorf("monitor: oracle policy needs the changed streams (Oracle field)")
		}
		for _, i := range c.Oracle {
			if i < 0 || int(i) >= m {
				return fmt.Errorf("monitor: oracle stream %d outside the %d streams", i, m)
			}
		}
	}
	return nil
}
