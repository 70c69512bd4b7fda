// Package drift builds drift scenarios: copies of a history.History in which
// one site's truth or inputs change from a given time on, as fixtures for the
// online calibrators and the coverage alarms.
//
// # Transforms
//
// StepChange, SlowDrift and StuckMeter change the meter readings of one site;
// WeatherBias changes one forecast variable of the weather runs of one site.
// Each takes a *history.History and returns a new one; the input is never
// modified. Scenario describes one transform with its parameters, and
// Standard returns the four standard scenarios for a data set.
//
// # Which inputs change
//
// A reading belongs to the period "from t on" when its interval starts at or
// after t (IntervalStart >= t); a reading that straddles t is left alone. A
// run belongs to it when it is issued at or after t (IssuedAt >= t); every row
// of such a run changes, whatever its valid time. Missing values (NaN) stay
// missing, except where a stuck meter overwrites them. Availability and
// curtailment flags, site registries and times are never changed.
//
// # Sharing
//
// The returned History has its own Sites, Runs and Readings slices. Runs that
// a transform changes get their own Rows and Values; the other runs share
// their Rows (and each row's Values) and Vars with the input, and the sites
// share their optional pointer fields (Lat, Lon, ...). Treat both histories
// as read-only, or copy before writing into shared parts.
//
// # Determinism
//
// The transforms use no randomness and read no clock: the same input and
// parameters give the same output.
//
// # Errors
//
// Every error caused by the arguments (an unknown site, a factor that is not
// a positive finite number, a time outside the site's data, a stuck period
// with no reading before it, a weather variable the runs do not hold) wraps
// ErrScenario.
package drift

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

// ErrScenario is wrapped by every error caused by the arguments of a
// transform or the fields of a Scenario.
var ErrScenario = errors.New("invalid drift scenario")

// Wind is the pseudo-variable of WeatherBias that scales the forecast wind:
// every wind variable a run holds among wind_ms, u_ms and v_ms, u10_ms and
// v10_ms. Scaling both components of a wind vector by a factor scales its
// speed by the same factor and keeps its direction, so wind_dir_deg is left
// alone. A component without its partner (u_ms without v_ms) is an error.
const Wind = "wind"

// week is the unit of SlowDrift's rate.
const week = 7 * 24 * time.Hour

// StepChange returns a copy of h in which every reading of site whose
// interval starts at or after from has its power multiplied by factor (a PV
// site losing a third of its output: factor 2/3).
//
// factor must be positive and finite; from must lie within the site's meter
// data (between the first and the last IntervalStart of its readings).
func StepChange(h *history.History, site string, from time.Time, factor float64) (*history.History, error) {
	const op = "step change"
	if err := checkFactor(op, site, factor); err != nil {
		return nil, err
	}
	idx, err := meterPeriod(h, op, site, from)
	if err != nil {
		return nil, err
	}
	out := shallowCopy(h)
	for _, i := range idx {
		if r := &out.Readings[i]; !r.IntervalStart.Before(from) {
			r.PowerMW *= factor
		}
	}
	return out, nil
}

// SlowDrift returns a copy of h in which every reading of site whose interval
// starts at or after from has its power multiplied by
//
//	(1 - perWeek)^w,  w = (IntervalStart - from) / 7 days
//
// (w is fractional; perWeek 0.01 loses 1 % a week, compounded). A negative
// perWeek makes the output grow. perWeek must be finite and below 1; from
// must lie within the site's meter data (see StepChange).
func SlowDrift(h *history.History, site string, from time.Time, perWeek float64) (*history.History, error) {
	const op = "slow drift"
	if !model.Finite(perWeek) || perWeek >= 1 {
		return nil, scenarioError(op, site, "rate %v per week: must be finite and below 1 (the weekly factor 1-rate must be positive)", perWeek)
	}
	idx, err := meterPeriod(h, op, site, from)
	if err != nil {
		return nil, err
	}
	out := shallowCopy(h)
	for _, i := range idx {
		if r := &out.Readings[i]; !r.IntervalStart.Before(from) {
			r.PowerMW *= driftFactor(perWeek, r.IntervalStart.Sub(from))
		}
	}
	return out, nil
}

// driftFactor is (1-perWeek)^(since in weeks).
func driftFactor(perWeek float64, since time.Duration) float64 {
	return math.Pow(1-perWeek, float64(since)/float64(week))
}

// WeatherBias returns a copy of h in which the forecast variable of every run
// of site issued at or after from is multiplied by factor, in every row: a
// change of weather model that makes the forecasts biased. variable is a
// column name of the weather file (ghi_wm2, wind_ms, ...) or Wind.
//
// factor must be positive and finite; from must lie between the site's first
// and last IssuedAt; every run issued from then on must hold the variable,
// otherwise the error names the variables the run holds.
func WeatherBias(h *history.History, site string, from time.Time, variable string, factor float64) (*history.History, error) {
	const op = "weather bias"
	if err := checkFactor(op, site, factor); err != nil {
		return nil, err
	}
	if err := checkSite(h, op, site); err != nil {
		return nil, err
	}
	var runs []int
	first, last := time.Time{}, time.Time{}
	for i := range h.Runs {
		run := &h.Runs[i]
		if run.Site != site {
			continue
		}
		if first.IsZero() || run.IssuedAt.Before(first) {
			first = run.IssuedAt
		}
		if last.IsZero() || run.IssuedAt.After(last) {
			last = run.IssuedAt
		}
		if !run.IssuedAt.Before(from) {
			runs = append(runs, i)
		}
	}
	if first.IsZero() {
		return nil, scenarioError(op, site, "the site has no weather run")
	}
	if from.Before(first) || from.After(last) {
		return nil, scenarioError(op, site, "from %s is outside the site's weather runs, issued %s to %s",
			from.Format(time.RFC3339), first.Format(time.RFC3339), last.Format(time.RFC3339))
	}
	// Resolve the columns of every run before copying anything.
	cols := make([][]int, len(runs))
	for k, i := range runs {
		c, err := columns(&h.Runs[i], variable)
		if err != nil {
			return nil, scenarioError(op, site, "%v", err)
		}
		cols[k] = c
	}
	out := shallowCopy(h)
	for k, i := range runs {
		run := &out.Runs[i]
		rows := slices.Clone(run.Rows)
		for j := range rows {
			v := slices.Clone(rows[j].Values)
			for _, c := range cols[k] {
				v[c] *= factor
			}
			rows[j].Values = v
		}
		run.Rows = rows
	}
	return out, nil
}

// columns returns the indexes in run.Vars of the variables that variable
// names (see Wind).
func columns(run *model.WeatherRun, variable string) ([]int, error) {
	issued := run.IssuedAt.Format(time.RFC3339)
	if variable != Wind {
		if c := run.Var(variable); c >= 0 {
			return []int{c}, nil
		}
		return nil, fmt.Errorf("variable %q is absent from the run issued %s, which holds %s",
			variable, issued, strings.Join(run.Vars, ", "))
	}
	var cols []int
	if c := run.Var("wind_ms"); c >= 0 {
		cols = append(cols, c)
	}
	for _, p := range [][2]string{{"u_ms", "v_ms"}, {"u10_ms", "v10_ms"}} {
		cu, cv := run.Var(p[0]), run.Var(p[1])
		switch {
		case cu >= 0 && cv >= 0:
			cols = append(cols, cu, cv)
		case cu >= 0 || cv >= 0:
			return nil, fmt.Errorf("variable %q: the run issued %s holds only one of %s and %s",
				variable, issued, p[0], p[1])
		}
	}
	if len(cols) == 0 {
		return nil, fmt.Errorf("variable %q: the run issued %s holds no wind variable (wind_ms, u_ms/v_ms, u10_ms/v10_ms), only %s",
			variable, issued, strings.Join(run.Vars, ", "))
	}
	slices.Sort(cols)
	return cols, nil
}

// StuckMeter returns a copy of h in which every reading of site whose interval
// starts in [from, from+d) repeats the power of the site's last reading
// before from: the finite reading with the latest End() at or before from (at
// equal ends, the later start). Readings in the period that were missing
// (NaN) get the stuck value too; intervals with no reading stay without one
// (a gap stays a gap).
//
// d must be positive; from must lie within the site's meter data (see
// StepChange), and a finite reading must end at or before it.
func StuckMeter(h *history.History, site string, from time.Time, d time.Duration) (*history.History, error) {
	const op = "stuck meter"
	if d <= 0 {
		return nil, scenarioError(op, site, "duration %v: must be positive", d)
	}
	idx, err := meterPeriod(h, op, site, from)
	if err != nil {
		return nil, err
	}
	stuck := -1
	for _, i := range idx {
		r := &h.Readings[i]
		if !model.Finite(r.PowerMW) || r.End().After(from) {
			continue
		}
		if stuck < 0 {
			stuck = i
			continue
		}
		s := &h.Readings[stuck]
		if c := r.End().Compare(s.End()); c > 0 || c == 0 && r.IntervalStart.After(s.IntervalStart) {
			stuck = i
		}
	}
	if stuck < 0 {
		return nil, scenarioError(op, site, "no finite reading ends at or before %s, so there is no value to repeat",
			from.Format(time.RFC3339))
	}
	value := h.Readings[stuck].PowerMW
	until := from.Add(d)
	out := shallowCopy(h)
	for _, i := range idx {
		if r := &out.Readings[i]; !r.IntervalStart.Before(from) && r.IntervalStart.Before(until) {
			r.PowerMW = value
		}
	}
	return out, nil
}

// shallowCopy returns a History with its own Sites, Runs and Readings slices.
// Readings are plain values, so the copy of a reading is a deep copy; runs
// share their Rows until a transform replaces them.
func shallowCopy(h *history.History) *history.History {
	return &history.History{
		Sites:    slices.Clone(h.Sites),
		Runs:     slices.Clone(h.Runs),
		Readings: slices.Clone(h.Readings),
	}
}

// checkSite reports an unknown site. It panics on a nil history.
func checkSite(h *history.History, op, site string) error {
	if h == nil {
		panic("drift: nil history")
	}
	ids := make([]string, len(h.Sites))
	for i := range h.Sites {
		if h.Sites[i].ID == site {
			return nil
		}
		ids[i] = h.Sites[i].ID
	}
	return scenarioError(op, site, "unknown site (the history holds %s)", strings.Join(ids, ", "))
}

// meterPeriod checks that site is known and that from lies between the first
// and the last IntervalStart of its readings, and returns the indexes of the
// site's readings in h.Readings.
func meterPeriod(h *history.History, op, site string, from time.Time) ([]int, error) {
	if err := checkSite(h, op, site); err != nil {
		return nil, err
	}
	var (
		idx         []int
		first, last time.Time
	)
	for i := range h.Readings {
		r := &h.Readings[i]
		if r.Site != site {
			continue
		}
		if len(idx) == 0 || r.IntervalStart.Before(first) {
			first = r.IntervalStart
		}
		if len(idx) == 0 || r.IntervalStart.After(last) {
			last = r.IntervalStart
		}
		idx = append(idx, i)
	}
	if len(idx) == 0 {
		return nil, scenarioError(op, site, "the site has no meter reading")
	}
	if from.Before(first) || from.After(last) {
		return nil, scenarioError(op, site, "from %s is outside the site's meter data, intervals starting %s to %s",
			from.Format(time.RFC3339), first.Format(time.RFC3339), last.Format(time.RFC3339))
	}
	return idx, nil
}

func checkFactor(op, site string, factor float64) error {
	if !(factor > 0) || math.IsInf(factor, 0) {
		return scenarioError(op, site, "factor %v: must be a positive finite number", factor)
	}
	return nil
}

// scenarioError returns "drift: <op> at site <site>: invalid drift scenario:
// <detail>".
func scenarioError(op, site, format string, args ...any) error {
	return fmt.Errorf("drift: %s at site %s: %w: %s", op, site, ErrScenario, fmt.Sprintf(format, args...))
}
