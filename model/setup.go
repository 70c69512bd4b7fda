package model

import "slices"

// Setup is what a site's forecaster is built with besides the site itself.
// The zero value means DefaultBuckets and DefaultLevels.
type Setup struct {
	// Buckets are the lead buckets the worker pools forecasts over.
	Buckets Buckets
	// Levels are the nominal quantile levels the worker publishes. A
	// forecaster is asked for other levels too (calibrators move them);
	// those it may answer by interpolation.
	Levels []float64
}

func (s Setup) withDefaults() Setup {
	if s.Buckets.Len() == 0 {
		s.Buckets = DefaultBuckets()
	}
	if len(s.Levels) == 0 {
		s.Levels = DefaultLevels()
	}
	s.Levels = slices.Clone(s.Levels)
	return s
}
