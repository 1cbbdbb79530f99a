package server

import "sparsewatch/server/review"

// The report is the scan command's (DESIGN.md, "scan writes a JSON
// report"): a finished session answers exactly what review.Run returned.
type (
	Report       = review.Report
	reportAlarm  = review.Alarm
	reportRegion = review.Region
)
