package model

import "time"

// Bundle is one refresh of one site's quantile forecast: for every coming
// valid interval (a step), the quantiles at each level, in MW.
//
// Q is row-major: the quantile of step i at level j is Q[i*len(Levels)+j].
// Quantiles of a step are non-decreasing in the level and lie within
// [0, CapacityMW*Availability].
type Bundle struct {
	Site string
	// IssuedAt is the site's event-time "now" when the bundle was made: the
	// end of the latest meter interval, or the issue time of the latest
	// weather run before any meter reading.
	IssuedAt time.Time
	// Watermark is the latest event time among the inputs the bundle used.
	Watermark time.Time
	// Model and Calibrator name the forecaster and the calibrator.
	Model      string
	Calibrator string
	// WeatherIssuedAt is the issue time of the newest weather run used (zero if none).
	WeatherIssuedAt time.Time
	CapacityMW      float64
	// Availability is the share of capacity available (0..1).
	Availability float64
	Levels       []float64
	Steps        []Step
	Q            []float64
	// Expected holds each step's expected value (the mean of its quantiles, an
	// approximation that is exact as the grid of levels becomes fine and even).
	Expected []float64
}

// Step is one valid interval of a bundle.
type Step struct {
	ValidStart   time.Time
	ValidMinutes int
	LeadMinutes  int
}

// Row returns the quantiles of step i (a sub-slice of Q, not a copy).
func (b *Bundle) Row(i int) []float64 {
	n := len(b.Levels)
	return b.Q[i*n : (i+1)*n : (i+1)*n]
}
