package model

import "time"

// Features is what a forecaster knows about one coming valid interval when it
// is asked for quantiles. The site actor builds it from the weather run in
// force and the site's recent readings; it is kept with the pending forecast
// and handed back to Learn when the interval's reading settles.
type Features struct {
	ValidStart   time.Time
	ValidMinutes int
	LeadMinutes  int
	// Bucket is the lead bucket of LeadMinutes (see Buckets).
	Bucket int
	// CapacityMW times Availability is the most the site can deliver.
	CapacityMW   float64
	Availability float64
	// Driver is the main physical driver of output for the interval: global
	// horizontal irradiance (W/m2) for PV, wind speed (m/s) for wind. NaN when
	// the weather run in force does not give it.
	Driver float64
	// RunAgeMinutes is how old the weather run in force was at issue (NaN if none).
	RunAgeMinutes float64
	// LastPowerMW is the latest observed mean power at issue (NaN if none).
	LastPowerMW float64
	// Night is true for a PV site when the sun is down over the interval.
	Night bool
	// HourUTC is the hour of day of the interval's middle, 0 <= HourUTC < 24.
	HourUTC float64
	// Weather is the row of the weather run in force that covers the
	// interval, nil when there is none; WeatherVars names its Values (the
	// run's Vars). Both belong to the run, which is never changed once
	// applied: a forecaster may keep the pointers (as a cache key, say) but
	// must not write through them.
	Weather     *WeatherRow
	WeatherVars []string
}

// Forecaster produces raw (uncalibrated) quantiles for one site and learns
// from settled outcomes. One forecaster belongs to one site actor and is not
// safe for concurrent use.
//
// Every implementation must pass the conformance suite in model/modeltest.
type Forecaster interface {
	// Name identifies the forecaster in bundles and reports.
	Name() string
	// Quantiles writes to dst[j] the forecast quantile of the interval at
	// levels[j], in MW. A level at or below 0 gives -Inf, at or above 1 +Inf
	// (calibrators may push a level out of (0, 1)); levels need not be sorted.
	// len(dst) must equal len(levels). It does not clip to capacity.
	Quantiles(dst []float64, x *Features, levels []float64)
	// Learn feeds one settled interval: its observed mean power y (MW) and
	// the features of each forecast issued for it that was still pending,
	// one per lead bucket, shortest lead first (at least one). It is called
	// once per interval; xs and its elements are only valid during the call.
	Learn(y float64, xs []*Features)
}

// PairQuantiler is implemented by forecasters that give the quantiles of
// one interval at two lists of levels for about the cost of one call: the
// raw levels and the calibrated ones of a refresh. QuantilesPair(a, la, b,
// lb, x) writes what Quantiles(a, x, la) and Quantiles(b, x, lb) would.
type PairQuantiler interface {
	QuantilesPair(a []float64, la []float64, b []float64, lb []float64, x *Features)
}
