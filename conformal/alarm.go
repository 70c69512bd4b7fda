package conformal

import (
	"encoding/binary"
	"fmt"
	"math"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

// Alarm kinds and states of an Event.
const (
	// KindCoverage: the calibrated coverage of a level is off target.
	KindCoverage = "coverage_off"
	// KindRawDrift: the raw model's coverage of a level is far off target,
	// so the calibrator is working hard to compensate: the model has
	// drifted from the site (a fault, soiling, a weather-model change).
	KindRawDrift = "raw_drift"

	StateRaised  = "raised"
	StateCleared = "cleared"
)

// Event is the alarm payload published on plumb.out.alarms.<site>, one JSON
// object per raise or clear. It is a wire contract: fields are only added.
type Event struct {
	// Site is the site's id.
	Site string `json:"site"`
	// Kind is what is wrong, e.g. KindCoverage.
	Kind string `json:"kind"`
	// State is StateRaised or StateCleared.
	State string `json:"state"`
	// Level is the quantile level concerned, when the alarm is about one.
	Level float64 `json:"level,omitempty"`
	// LeadBucket names the lead bucket concerned (e.g. "4h-8h"), if any.
	LeadBucket string `json:"lead_bucket,omitempty"`
	// Target is the coverage aimed at (0..1).
	Target float64 `json:"target"`
	// Observed is the coverage over the window (0..1).
	Observed float64 `json:"observed"`
	// Window is the number of outcomes the observed coverage is taken over.
	Window int `json:"window"`
	// PValue is the p-value of the coverage test on the window (the
	// batch-means test of AlarmOptions.Batches).
	PValue float64 `json:"p_value"`
	// EventTime is the event time (from the data) of the check that
	// changed the state, in UTC.
	EventTime time.Time `json:"event_time"`
	// Reason is a short human-readable explanation.
	Reason string `json:"reason"`
}

// Defaults of AlarmOptions.
const (
	DefaultAlarmTolerance  = 0.05
	DefaultAlarmPValue     = 0.01
	DefaultAlarmMinSamples = 96
	DefaultAlarmBatches    = 8
)

// AlarmOptions configures a CoverageAlarm. The zero value is the default.
type AlarmOptions struct {
	// Tolerance: the alarm is raised when |coverage - target| > Tolerance
	// (and the coverage test rejects, see PValue). Zero means 0.05; it must
	// lie in [0, 1).
	Tolerance float64
	// ClearTolerance: a raised alarm clears when |coverage - target| <=
	// ClearTolerance. Zero means Tolerance/2; it must not exceed Tolerance.
	// The gap between the two is the hysteresis that keeps the alarm from
	// flapping when the coverage hovers at the threshold.
	ClearTolerance float64
	// PValue: the alarm is raised only if the coverage test (see Batches)
	// rejects the target at this significance (p-value < PValue), so a
	// window's noise does not raise it. Zero means 0.01; it must lie in [0, 1].
	PValue float64
	// MinSamples is the fewest outcomes in the window before the alarm
	// changes state either way. Zero means 96 (a day of 15-minute
	// intervals); it must not be negative, and is raised to 2 x Batches.
	MinSamples int
	// Batches is the number of consecutive batches the window is cut into
	// for the coverage test. Outcomes of forecasts for neighbouring
	// intervals share their weather errors for hours to days, so they are
	// far from independent and a binomial test (Kupiec) on them rejects far
	// too often. The test is the batch-means t-test of simulation output
	// analysis (common practice): the spread of the batches' coverages
	// estimates the standard error of the window's coverage, never taken
	// below the binomial one. Zero means 8; it must be at least 2.
	Batches int
	// Kind is the alarm kind of the events; "" means KindCoverage.
	Kind string
}

// resolve applies the defaults and checks the options.
func (o AlarmOptions) resolve() (AlarmOptions, error) {
	if o.Tolerance == 0 {
		o.Tolerance = DefaultAlarmTolerance
	}
	if o.ClearTolerance == 0 {
		o.ClearTolerance = o.Tolerance / 2
	}
	if o.PValue == 0 {
		o.PValue = DefaultAlarmPValue
	}
	if o.MinSamples == 0 {
		o.MinSamples = DefaultAlarmMinSamples
	}
	if o.Batches == 0 {
		o.Batches = DefaultAlarmBatches
	}
	if o.Kind == "" {
		o.Kind = KindCoverage
	}

	switch {
	case !(o.Tolerance > 0 && o.Tolerance < 1):
		return o, fmt.Errorf("conformal: alarm tolerance %v is outside [0, 1)", o.Tolerance)
	case !(o.ClearTolerance > 0 && o.ClearTolerance <= o.Tolerance):
		return o, fmt.Errorf("conformal: alarm clear tolerance %v is outside (0, tolerance %v]", o.ClearTolerance, o.Tolerance)
	case !(o.PValue > 0 && o.PValue <= 1):
		return o, fmt.Errorf("conformal: alarm p-value %v is outside [0, 1]", o.PValue)
	case o.MinSamples < 0:
		return o, fmt.Errorf("conformal: alarm min samples %d is negative", o.MinSamples)
	case o.Batches < 2:
		return o, fmt.Errorf("conformal: alarm batches %d is below 2", o.Batches)
	}
	if o.MinSamples < 2*o.Batches {
		o.MinSamples = 2 * o.Batches
	}
	return o, nil
}

// CoverageAlarm is the hysteresis state machine of the "calibrated coverage
// off target" alarm of one (lead bucket, level). It is raised when the
// window holds at least MinSamples outcomes, the coverage is further than
// Tolerance from target and the batch-means test rejects; it clears when the
// coverage is back within ClearTolerance. Between the two thresholds it
// keeps its state, so it does not flap.
//
// The zero CoverageAlarm is not usable: build one with NewCoverageAlarm. It
// is not safe for concurrent use.
type CoverageAlarm struct {
	opt    AlarmOptions
	raised bool
	// The last evaluation, reported by Event.
	target, observed, pValue float64
	n                        int
	batch                    []float64 // scratch for the batch coverages
}

// NewCoverageAlarm returns a cleared alarm, or an error for invalid options.
func NewCoverageAlarm(o AlarmOptions) (*CoverageAlarm, error) {
	o, err := o.resolve()
	if err != nil {
		return nil, err
	}
	return &CoverageAlarm{opt: o, batch: make([]float64, o.Batches)}, nil
}

// Options returns the options in force, defaults applied.
func (a *CoverageAlarm) Options() AlarmOptions { return a.opt }

// Raised reports whether the alarm is raised.
func (a *CoverageAlarm) Raised() bool { return a.raised }

// Check evaluates the window's coverage against the target coverage (in
// (0, 1); for the quantile at level tau the target is tau) and reports
// whether the state changed and whether the alarm is now raised. Below
// MinSamples outcomes the state never changes. It panics on a target
// outside (0, 1).
func (a *CoverageAlarm) Check(w *Window, target float64) (changed, raised bool) {
	if !validLevel(target) {
		panic("conformal: CoverageAlarm.Check needs a target in (0, 1)")
	}
	n := w.Count()
	if n == 0 {
		return false, a.raised
	}
	a.target, a.observed, a.n = target, w.Coverage(), n
	if n < a.opt.MinSamples {
		return false, a.raised
	}
	// thresholdSlack keeps rounding from deciding a coverage that sits
	// exactly on a threshold (0.9 - 340/400 is 0.05000000000000004).
	const thresholdSlack = 1e-12
	off := math.Abs(a.observed - target)
	switch {
	case !a.raised && off > a.opt.Tolerance+thresholdSlack:
		// The test costs O(window); it only runs past the tolerance.
		if a.pValue = a.test(w, target); a.pValue < a.opt.PValue {
			a.raised = true
			return true, true
		}
	case a.raised && off <= a.opt.ClearTolerance+thresholdSlack:
		a.pValue = a.test(w, target)
		a.raised = false
		return true, false
	}
	return false, a.raised
}

// test returns the two-sided p-value of the batch-means test of the
// window's coverage against target (see AlarmOptions.Batches).
func (a *CoverageAlarm) test(w *Window, target float64) float64 {
	n := float64(w.Count())
	cov := w.Coverage()
	se := math.Sqrt(target * (1 - target) / n) // binomial, independent outcomes
	if len(a.batch) != a.opt.Batches {
		a.batch = make([]float64, a.opt.Batches) // after UnmarshalBinary
	}
	b := w.BatchCoverages(a.batch)
	var ss float64
	for _, c := range b {
		ss += (c - cov) * (c - cov)
	}
	nb := float64(len(b))
	z := math.Abs(cov-target) / se
	if seb := math.Sqrt(ss / (nb - 1) / nb); seb > se {
		t := math.Abs(cov-target) / seb
		return 2 * distuv.StudentsT{Mu: 0, Sigma: 1, Nu: nb - 1}.Survival(t)
	}
	return 2 * distuv.UnitNormal.Survival(z)
}

// what names the coverage the alarm watches, for its reasons.
func (a *CoverageAlarm) what() string {
	if a.opt.Kind == KindRawDrift {
		return "raw model coverage (before calibration)"
	}
	return "calibrated coverage"
}

// Event describes the alarm's current state and last check as a payload of
// kind KindCoverage for a site, a quantile level and a lead bucket name, at
// the given event time (taken from the data; stored in UTC). Call it after
// Check reported a change; before any check saw an outcome, Target,
// Observed, Window and PValue are zero.
func (a *CoverageAlarm) Event(site string, level float64, leadBucket string, at time.Time) Event {
	e := Event{
		Site:       site,
		Kind:       a.opt.Kind,
		State:      StateCleared,
		Level:      level,
		LeadBucket: leadBucket,
		Target:     a.target,
		Observed:   a.observed,
		Window:     a.n,
		PValue:     a.pValue,
		EventTime:  at.UTC(),
	}
	if a.raised {
		e.State = StateRaised
		dir := "below"
		if a.observed > a.target {
			dir = "above"
		}
		e.Reason = fmt.Sprintf("%s %.3f is %s target %.3f by more than %.3f over %d outcomes (batch-means test p-value %.2g, under %.2g)",
			a.what(), a.observed, dir, a.target, a.opt.Tolerance, a.n, a.pValue, a.opt.PValue)
	} else {
		e.Reason = fmt.Sprintf("%s %.3f is back within %.3f of target %.3f over %d outcomes",
			a.what(), a.observed, a.opt.ClearTolerance, a.target, a.n)
	}
	return e
}

// alarmStateLen is the length of a version-1 alarm state: the version byte,
// the raised flag, target, observed and p-value as doubles and the sample
// count as uint64.
const alarmStateLen = 1 + 1 + 3*8 + 8

// MarshalBinary encodes the alarm's state (not its options): a version byte
// (1), the raised flag (0 or 1), the last target, observed coverage and
// p-value as little-endian doubles and the last sample count as uint64.
func (a *CoverageAlarm) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, alarmStateLen)
	b = append(b, stateVersion, 0)
	if a.raised {
		b[1] = 1
	}
	b = appendFloat(b, a.target)
	b = appendFloat(b, a.observed)
	b = appendFloat(b, a.pValue)
	return binary.LittleEndian.AppendUint64(b, uint64(a.n)), nil
}

// UnmarshalBinary restores a state written by MarshalBinary into an alarm
// built by NewCoverageAlarm, whose options stay in force. It refuses an
// unknown version, a wrong length or impossible values with an error
// wrapping ErrState, and leaves a unchanged then.
func (a *CoverageAlarm) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("coverage alarm", data, alarmStateLen)
	if err != nil {
		return err
	}
	flag := r.b[0]
	r.b = r.b[1:]
	target, observed, p := r.float(), r.float(), r.float()
	n := binary.LittleEndian.Uint64(r.b)
	valid := flag <= 1 && n <= math.MaxInt32 &&
		((n == 0 && target == 0 && observed == 0 && p == 0) ||
			(n > 0 && validLevel(target) && observed >= 0 && observed <= 1 && p >= 0 && p <= 1))
	if !valid {
		return fmt.Errorf("%w: coverage alarm: flag %d, target %v, observed %v, p-value %v, count %d are impossible",
			ErrState, flag, target, observed, p, n)
	}
	a.raised = flag == 1
	a.target, a.observed, a.pValue, a.n = target, observed, p, int(n)
	return nil
}
