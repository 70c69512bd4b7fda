package model

import (
	"math"
	"time"
)

// WeatherRun is one weather-model run for one site: the forecast values of
// some variables over a series of valid intervals, usable from IssuedAt on.
type WeatherRun struct {
	Site     string
	IssuedAt time.Time
	// Source names the weather model or provider; runs are identified by
	// (Site, IssuedAt, Source). Empty is a valid source.
	Source string
	// Vars names the variables, sorted; each row's Values follows this order.
	Vars []string
	// Rows are sorted by ValidStart and do not overlap.
	Rows []WeatherRow
}

// WeatherRow holds the variables of one valid interval. A missing value is NaN.
type WeatherRow struct {
	ValidStart   time.Time
	ValidMinutes int
	Values       []float64
}

// End returns the end of the row's valid interval.
func (r *WeatherRow) End() time.Time {
	return r.ValidStart.Add(time.Duration(r.ValidMinutes) * time.Minute)
}

// Var returns the index of the named variable in run.Vars, or -1.
func (run *WeatherRun) Var(name string) int {
	for i, v := range run.Vars {
		if v == name {
			return i
		}
	}
	return -1
}

// At returns the row whose valid interval holds t, or nil.
func (run *WeatherRun) At(t time.Time) *WeatherRow {
	// Rows are sorted; binary search for the last row starting at or before t.
	lo, hi := 0, len(run.Rows)
	for lo < hi {
		m := (lo + hi) / 2
		if run.Rows[m].ValidStart.After(t) {
			hi = m
		} else {
			lo = m + 1
		}
	}
	if lo == 0 {
		return nil
	}
	r := &run.Rows[lo-1]
	if t.Before(r.End()) {
		return r
	}
	return nil
}

// Reading is one meter reading: the mean power of a site over an interval.
type Reading struct {
	Site            string
	IntervalStart   time.Time
	IntervalMinutes int
	PowerMW         float64
	// Availability is the share of capacity available (0..1); 1 when not given.
	Availability float64
	// Curtailed marks a reading the grid or market held below what the
	// weather allowed; it says nothing about the weather and is not learned from.
	Curtailed bool
}

// End returns the end of the reading's interval: the event time at which the
// reading becomes known.
func (r *Reading) End() time.Time {
	return r.IntervalStart.Add(time.Duration(r.IntervalMinutes) * time.Minute)
}

// Finite reports whether x is neither NaN nor infinite.
func Finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
