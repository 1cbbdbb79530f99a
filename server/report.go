package server

// Report is the review report, the same schema as the scan command's
// (DESIGN.md, "scan writes a JSON report").
type Report struct {
	Width        int           `json:"width"`
	Height       int           `json:"height"`
	Streams      int           `json:"streams"`
	Budget       int           `json:"budget"`
	ControlLimit float64       `json:"control_limit"`
	Frames       int           `json:"frames"`
	PixelsRead   int64         `json:"pixels_read"`
	Alarms       []reportAlarm `json:"alarms"`
}

type reportAlarm struct {
	Frame    int            `json:"frame"`
	EndFrame int            `json:"end_frame"`
	Peak     float64        `json:"peak"`
	Regions  []reportRegion `json:"regions"`
}

type reportRegion struct {
	BBox     [4]int     `json:"bbox"`
	Centroid [2]float64 `json:"centroid"`
	Area     int        `json:"area"`
	Onset    int        `json:"onset"`
	Peak     float64    `json:"peak"`
}
