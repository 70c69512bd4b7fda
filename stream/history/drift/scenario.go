package drift

import (
	"fmt"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

// Kind names the transform of a Scenario.
type Kind string

// Scenario kinds, one per transform.
const (
	KindStep        Kind = "step"         // StepChange
	KindDrift       Kind = "drift"        // SlowDrift
	KindWeatherBias Kind = "weather-bias" // WeatherBias
	KindStuck       Kind = "stuck"        // StuckMeter
)

// Scenario describes one drift scenario: a transform, the site it applies to,
// when it starts and its parameters. Only the parameters of its Kind are
// used; the others are ignored.
type Scenario struct {
	// Name identifies the scenario in test names and reports, e.g. "step-2/3".
	Name string
	Kind Kind
	// Site is the id of the site whose readings or runs change.
	Site string
	// From is when the change starts (see the package doc for which readings
	// and runs count as "from From on").
	From time.Time
	// Factor multiplies the meter output (KindStep) or the weather variable
	// (KindWeatherBias); it must be positive and finite.
	Factor float64
	// PerWeek is the share of output lost per week, compounded (KindDrift);
	// it must be finite and below 1.
	PerWeek float64
	// Variable is the weather variable to scale (KindWeatherBias): a column
	// of the weather file such as ghi_wm2, or Wind.
	Variable string
	// Duration is how long the meter stays stuck (KindStuck); positive.
	Duration time.Duration
	// ChangeAt is the event time at which the scenario's history first
	// departs from the original: the End() of the first reading of Site that
	// Apply rescales or replaces (for KindDrift, the first one starting after
	// From, since the factor at From itself is 1), or the IssuedAt of the
	// first run of Site it biases. Every event before ChangeAt is the same in
	// both histories; the input at ChangeAt may still be equal in value (a
	// PV reading of zero at night stays zero when rescaled). Alarms and
	// calibrators are judged on how they react after it. Standard and
	// StandardFor set it; Apply neither reads nor checks it.
	ChangeAt time.Time
}

// Apply returns a copy of h transformed by the scenario (see StepChange,
// SlowDrift, WeatherBias and StuckMeter); h is not modified. An unknown Kind
// is an error wrapping ErrScenario.
func (s Scenario) Apply(h *history.History) (*history.History, error) {
	var (
		out *history.History
		err error
	)
	switch s.Kind {
	case KindStep:
		out, err = StepChange(h, s.Site, s.From, s.Factor)
	case KindDrift:
		out, err = SlowDrift(h, s.Site, s.From, s.PerWeek)
	case KindWeatherBias:
		out, err = WeatherBias(h, s.Site, s.From, s.Variable, s.Factor)
	case KindStuck:
		out, err = StuckMeter(h, s.Site, s.From, s.Duration)
	default:
		err = fmt.Errorf("drift: %w: unknown kind %q (want %s, %s, %s or %s)",
			ErrScenario, s.Kind, KindStep, KindDrift, KindWeatherBias, KindStuck)
	}
	if err != nil {
		return nil, fmt.Errorf("scenario %q: %w", s.Name, err)
	}
	return out, nil
}

// Names and parameters of the standard scenarios.
const (
	stepFactor    = 2.0 / 3 // output falls by a third
	driftPerWeek  = 0.01    // 1 % a week
	weatherFactor = 0.8
	stuckFor      = 24 * time.Hour
)

// Standard returns the four standard scenarios for the first site of h (see
// StandardFor), or nil when h has no site or its first site has no reading.
func Standard(h *history.History) []Scenario {
	if h == nil || len(h.Sites) == 0 {
		return nil
	}
	s, err := StandardFor(h, h.Sites[0].ID)
	if err != nil {
		return nil
	}
	return s
}

// StandardFor returns the four standard scenarios for one site of h, all
// starting at the middle of the site's meter data:
//
//	step-2/3         the output falls by a third (KindStep, Factor 2/3)
//	drift-1pct-week  the output falls by 1 % a week (KindDrift, PerWeek 0.01)
//	weather-0.8      the main weather driver is forecast 20 % low
//	                 (KindWeatherBias, Factor 0.8; ghi_wm2 for a PV site,
//	                 Wind for a wind site)
//	stuck-1d         the meter is stuck for one day (KindStuck, 24 h)
//
// The middle is the midpoint between the site's first IntervalStart and last
// End(), moved back to midnight UTC and then forward to the first
// IntervalStart of the site at or after that midnight. ChangeAt is set from
// the data. The scenarios are only described, not checked: Apply reports
// what does not fit (for instance no weather run around the middle). An
// unknown site or a site with no reading is an error wrapping ErrScenario.
func StandardFor(h *history.History, site string) ([]Scenario, error) {
	const op = "standard scenarios"
	if err := checkSite(h, op, site); err != nil {
		return nil, err
	}
	var kind model.Kind
	for i := range h.Sites {
		if h.Sites[i].ID == site {
			kind = h.Sites[i].Kind
		}
	}
	from, ok := middle(h, site)
	if !ok {
		return nil, scenarioError(op, site, "the site has no meter reading")
	}
	driver := "ghi_wm2"
	if kind == model.KindWind {
		driver = Wind
	}
	sc := []Scenario{
		{Name: "step-2/3", Kind: KindStep, Site: site, From: from, Factor: stepFactor},
		{Name: "drift-1pct-week", Kind: KindDrift, Site: site, From: from, PerWeek: driftPerWeek},
		{Name: "weather-0.8", Kind: KindWeatherBias, Site: site, From: from, Variable: driver, Factor: weatherFactor},
		{Name: "stuck-1d", Kind: KindStuck, Site: site, From: from, Duration: stuckFor},
	}
	for i := range sc {
		sc[i].ChangeAt = changeAt(h, &sc[i])
	}
	return sc, nil
}

// middle returns the start of the standard scenarios for site (see
// StandardFor); false when the site has no reading.
func middle(h *history.History, site string) (time.Time, bool) {
	var lo, hi time.Time
	n := 0
	for i := range h.Readings {
		r := &h.Readings[i]
		if r.Site != site {
			continue
		}
		if n == 0 || r.IntervalStart.Before(lo) {
			lo = r.IntervalStart
		}
		if n == 0 || r.End().After(hi) {
			hi = r.End()
		}
		n++
	}
	if n == 0 {
		return time.Time{}, false
	}
	// Truncate counts from the zero time, which is midnight UTC.
	day := lo.Add(hi.Sub(lo) / 2).Truncate(24 * time.Hour)
	var from time.Time
	for i := range h.Readings {
		r := &h.Readings[i]
		if r.Site != site || r.IntervalStart.Before(day) {
			continue
		}
		if from.IsZero() || r.IntervalStart.Before(from) {
			from = r.IntervalStart
		}
	}
	if from.IsZero() { // no reading starts after the midnight: take the last
		for i := range h.Readings {
			if r := &h.Readings[i]; r.Site == site && r.IntervalStart.After(from) {
				from = r.IntervalStart
			}
		}
	}
	return from, true
}

// changeAt returns the event time of the first input of h that s alters (see
// Scenario.ChangeAt), or the zero time when it alters none.
func changeAt(h *history.History, s *Scenario) time.Time {
	var first time.Time
	consider := func(t time.Time) {
		if first.IsZero() || t.Before(first) {
			first = t
		}
	}
	if s.Kind == KindWeatherBias {
		for i := range h.Runs {
			if run := &h.Runs[i]; run.Site == s.Site && !run.IssuedAt.Before(s.From) {
				consider(run.IssuedAt)
			}
		}
		return first
	}
	for i := range h.Readings {
		r := &h.Readings[i]
		if r.Site != s.Site {
			continue
		}
		var altered bool
		switch s.Kind {
		case KindStep:
			altered = !r.IntervalStart.Before(s.From)
		case KindDrift:
			altered = r.IntervalStart.After(s.From)
		case KindStuck:
			altered = !r.IntervalStart.Before(s.From) && r.IntervalStart.Before(s.From.Add(s.Duration))
		}
		if altered {
			consider(r.End())
		}
	}
	return first
}
