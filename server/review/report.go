package review

// Report is the scan report (DESIGN.md, "scan writes a JSON report"): the
// contract's fields first, then what else a reader needs to trust it.
type Report struct {
	Width        int     `json:"width"`
	Height       int     `json:"height"`
	Streams      int     `json:"streams"`
	Budget       int     `json:"budget"`
	ControlLimit float64 `json:"control_limit"`
	Frames       int     `json:"frames"`      // good frames scanned, reference frames included
	PixelsRead   int64   `json:"pixels_read"` // every pixel value read, reference frames included
	Alarms       []Alarm `json:"alarms"`

	BytesRead       int64        `json:"bytes_read"` // bytes taken from storage
	Policy          string       `json:"policy"`
	Tile            int          `json:"tile"`
	GridWidth       int          `json:"grid_width"`
	GridHeight      int          `json:"grid_height"`
	TopR            int          `json:"top_r"`
	Shift           float64      `json:"shift"`
	Compensation    float64      `json:"compensation"` // absolute c the engine used
	ReferenceFrames int          `json:"reference_frames"`
	FirstWatched    int          `json:"first_watched_frame"` // index of the first frame after the reference frames (-1 if none)
	FramesWatched   int          `json:"frames_watched"`
	WatchPixelsRead int64        `json:"watch_pixels_read"` // pixels read after the reference frames
	WatchBytesRead  int64        `json:"watch_bytes_read"`  // bytes read after the reference frames
	Model           string       `json:"model"`
	Calibration     *Calibration `json:"calibration,omitempty"`
	Errors          []FileError  `json:"errors"`
	Warnings        []string     `json:"warnings,omitempty"`
	Skipped         []string     `json:"skipped,omitempty"` // files ignored: not a frame format
	Seconds         float64      `json:"seconds"`
}

// Alarm is one episode, frames counted over the whole sequence.
type Alarm struct {
	Frame    int     `json:"frame"`
	EndFrame int     `json:"end_frame"` // -1: still on at the end
	Peak     float64 `json:"peak"`
	// Regions are the regions at the episode's largest G (so far, while it
	// is still on), strongest first; StartRegions those at the alarm frame.
	Regions      []Region `json:"regions"`
	StartRegions []Region `json:"start_regions"`
}

// Region is a group of changed streams in pixel coordinates.
type Region struct {
	BBox     [4]int     `json:"bbox"`     // x0, y0, x1, y1, inclusive
	Centroid [2]float64 `json:"centroid"` // x, y
	Area     int        `json:"area"`     // pixels covered by the region's streams (streams x tile^2)
	Onset    int        `json:"onset"`    // estimated change frame
	Peak     float64    `json:"peak"`     // largest local statistic
}

// FileError is one bad input, with the file and the reason.
type FileError struct {
	Frame  int    `json:"frame"` // its index in the sequence, -1 when none
	File   string `json:"file"`
	Reason string `json:"reason"`
}

// Calibration tells how the control limit was set.
type Calibration struct {
	TargetARL0   float64 `json:"target_arl0"`
	ARL0         float64 `json:"arl0"`
	ARL0SE       float64 `json:"arl0_se"`
	VerifiedARL0 float64 `json:"verified_arl0"`
	VerifiedSE   float64 `json:"verified_se"`
	Model        string  `json:"model"`
	Extrapolated bool    `json:"extrapolated"`
	Paths        int     `json:"paths"`
	Note         string  `json:"note"`
	Seconds      float64 `json:"seconds"`
}
