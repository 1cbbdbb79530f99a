package monitor

// State is what the engine is doing at a frame.
type State uint8

const (
	Watching State = iota // in control, G < h
	Alarming              // inside an alarm episode
)

func (s State) String() string {
	if s == Alarming {
		return "alarm"
	}
	return "watching"
}

// Region is one 8-connected group of streams whose local statistic is high
// during an alarm. Coordinates are on the stream grid, inclusive; callers
// that tile map them back to pixels.
type Region struct {
	X0, Y0, X1, Y1 int
	CX, CY         float64 // centroid, weighted by local statistic
	Area           int     // streams in the region
	Peak           float64 // largest local statistic in the region
	Onset          int     // estimated change frame: last frame its peak stream's CUSUM was zero
}

// Alarm is one episode: from the first frame with G >= h until G falls below
// the hysteresis level (or the restart).
type Alarm struct {
	Frame    int      // first frame with G >= h
	EndFrame int      // last frame of the episode; -1 while it is still on
	Peak     float64  // largest G during the episode
	Regions  []Region // at the start: regions at the alarm frame; at the end: regions
	// at the frame of the largest G, usually the fuller picture (the caller owns this copy)
}

// Update is what one Step reports. Slices are engine-owned and valid until
// the next Step; copy what you keep.
type Update struct {
	Frame   int     // frame index (Config.FirstFrame + steps so far - 1)
	G       float64 // global statistic: sum of the top-r local statistics (spatial: max(GPixel, SpatialScale*GWindow))
	GPixel  float64 // sum of the top-r local statistics
	GWindow float64 // spatial policy: largest pooled window statistic (at least SpatialHot); else 0
	Limit   float64 // h
	State   State
	Read    []int32  // streams read at this frame
	Regions []Region // current regions while alarming, else empty
	Started *Alarm   // non-nil at the frame an episode starts
	Ended   *Alarm   // non-nil at the frame an episode ends
}
