// Package history reads and writes the canonical history layout: one folder
// per data set holding
//
//	sites.json       an array of site objects (see model.ParseSites)
//	weather.csv.gz   site, issued_at, valid_start, valid_minutes, <variables...>
//	meter.csv.gz     site, interval_start, interval_minutes, power_mw
//	                 [, availability][, curtailed]
//
// Each CSV file may also be stored uncompressed (weather.csv, meter.csv), but
// not both ways at once. All times are RFC 3339 in UTC; an empty cell is a
// missing value.
//
// # Weather runs
//
// Weather rows are grouped into runs by (site, issued_at); the layout has no
// source column, so every run's Source is empty. Every run of a file carries
// every variable column of the file, in sorted order (model.WeatherRun.Vars),
// with NaN where the cell is empty. A run's rows are sorted by valid_start
// and must not overlap.
//
// # Meter readings
//
// The optional availability column (0..1) defaults to 1 when absent or empty;
// the optional curtailed column (true/false or 1/0) defaults to false. An empty
// power_mw is kept as a NaN reading. Two readings of the same site and
// interval are an error.
//
// # Order
//
// Load returns runs sorted by (IssuedAt, Site) and readings sorted by
// (End(), Site, IntervalStart); Events merges both on event time.
//
// # Errors
//
// Errors caused by the content of a file are *ParseError values, which name
// the file, line and column and match ErrMalformed with errors.Is. A missing
// file matches fs.ErrNotExist.
package history

import (
	"cmp"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// History is the content of one history folder.
type History struct {
	// Sites is the site registry, in the order of sites.json.
	Sites []model.Site
	// Runs are the weather runs, sorted by (IssuedAt, Site) when loaded.
	Runs []model.WeatherRun
	// Readings are the meter readings, sorted by (End(), Site, IntervalStart)
	// when loaded.
	Readings []model.Reading
}

// File names of the canonical layout.
const (
	SitesFile   = "sites.json"
	WeatherFile = "weather.csv"
	MeterFile   = "meter.csv"
)

// ErrMalformed is matched by every error caused by the content of a history
// folder (a bad cell, a missing column, an unknown site, overlapping rows).
var ErrMalformed = errors.New("malformed history")

// ErrUnknownSite is returned by Load when LoadOptions.Sites names a site that
// sites.json does not hold.
var ErrUnknownSite = errors.New("unknown site")

// ParseError reports a problem in one file of a history folder. Line counts
// from 1 (the header line); 0 when the problem is not tied to a line.
type ParseError struct {
	File   string // base name, e.g. "weather.csv.gz"
	Line   int
	Column string // column name; empty when the problem is not tied to one
	Err    error
}

func (e *ParseError) Error() string {
	s := e.File
	if e.Line > 0 {
		s += fmt.Sprintf(":%d", e.Line)
	}
	if e.Column != "" {
		s += ": column " + e.Column
	}
	return s + ": " + e.Err.Error()
}

// Unwrap returns ErrMalformed and the underlying error.
func (e *ParseError) Unwrap() []error { return []error{ErrMalformed, e.Err} }

// Event is one input of a replay: exactly one of Run and Reading is set. The
// pointers point into the History the event came from.
type Event struct {
	// Time is the event time: a run's IssuedAt or a reading's End().
	Time    time.Time
	Run     *model.WeatherRun
	Reading *model.Reading
}

// Site returns the event's site id.
func (e *Event) Site() string {
	if e.Run != nil {
		return e.Run.Site
	}
	return e.Reading.Site
}

// Events returns every run and reading of h as events in replay order:
//
//  1. by event time (a run's IssuedAt, a reading's End());
//  2. at the same time, readings before runs, so that a forecast refreshed on
//     a run issued at t already knows every interval closed by t;
//  3. then by site id;
//  4. then readings by IntervalStart (the longer interval first) and runs by
//     Source;
//  5. then in the order of h.Readings and h.Runs.
//
// The order does not depend on the order of h's slices except in case 5,
// which Load never produces. The events point into h.Runs and h.Readings:
// do not grow those slices while using them.
func (h *History) Events() []Event {
	ev := make([]Event, 0, len(h.Runs)+len(h.Readings))
	for i := range h.Readings {
		ev = append(ev, Event{Time: h.Readings[i].End(), Reading: &h.Readings[i]})
	}
	for i := range h.Runs {
		ev = append(ev, Event{Time: h.Runs[i].IssuedAt, Run: &h.Runs[i]})
	}
	slices.SortStableFunc(ev, compareEvents)
	return ev
}

func compareEvents(a, b Event) int {
	if c := a.Time.Compare(b.Time); c != 0 {
		return c
	}
	// Readings (Run == nil) first.
	if ar, br := a.Run != nil, b.Run != nil; ar != br {
		if br {
			return -1
		}
		return 1
	}
	if c := cmp.Compare(a.Site(), b.Site()); c != 0 {
		return c
	}
	if a.Reading != nil {
		return a.Reading.IntervalStart.Compare(b.Reading.IntervalStart)
	}
	return cmp.Compare(a.Run.Source, b.Run.Source)
}

// Sort puts h's runs in (IssuedAt, Site, Source) order, each run's rows in
// ValidStart order, and h's readings in (End(), Site, IntervalStart) order:
// the order Load returns. It is stable.
func (h *History) Sort() {
	slices.SortStableFunc(h.Runs, compareRuns)
	for i := range h.Runs {
		rows := h.Runs[i].Rows
		if !slices.IsSortedFunc(rows, compareRows) {
			slices.SortStableFunc(rows, compareRows)
		}
	}
	slices.SortStableFunc(h.Readings, compareReadings)
}

func compareRuns(a, b model.WeatherRun) int {
	if c := a.IssuedAt.Compare(b.IssuedAt); c != 0 {
		return c
	}
	if c := cmp.Compare(a.Site, b.Site); c != 0 {
		return c
	}
	return cmp.Compare(a.Source, b.Source)
}

func compareRows(a, b model.WeatherRow) int { return a.ValidStart.Compare(b.ValidStart) }

func compareReadings(a, b model.Reading) int {
	if c := a.End().Compare(b.End()); c != 0 {
		return c
	}
	if c := cmp.Compare(a.Site, b.Site); c != 0 {
		return c
	}
	return a.IntervalStart.Compare(b.IntervalStart)
}
