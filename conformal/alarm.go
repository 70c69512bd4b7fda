package conformal

import (
	"fmt"
	"math"
	"sync"
	"time"
)

// Alarm kinds and states of an Event.
const (
	// KindCoverage: the calibrated coverage of a level is off target.
	KindCoverage = "coverage_off"
	// KindRawDrift: the raw model's coverage of a level has moved away
	// from its own history, so the calibrator has to work harder: the model
	// has drifted from the site (a fault, soiling, a weather-model change).
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
	// Observed is the recent coverage (0..1): the exponentially weighted
	// share of hits, with a half-life of AlarmOptions.Recent outcomes.
	Observed float64 `json:"observed"`
	// Window is the number of outcomes the alarm has seen.
	Window int `json:"window"`
	// PValue is the two-sided normal tail probability of Z: a rough guide
	// only, as the gaps of neighbouring outcomes are neither independent
	// nor normal.
	PValue float64 `json:"p_value"`
	// Reference is what Observed is compared with: the target for a
	// coverage_off event, the coverage over the alarm's longer history
	// (half-life AlarmOptions.Reference) for a raw_drift event.
	Reference float64 `json:"reference"`
	// Z is Observed - Reference in units of the usual spread of the recent
	// coverage around the longer-run one at this site, lead bucket and
	// level.
	Z float64 `json:"z"`
	// Cells is how many (lead bucket, level) pairs of the site had this
	// kind of alarm raised when the event was published: the site's alarm
	// of a kind is raised by its first pair and cleared by its last.
	Cells int `json:"cells,omitempty"`
	// EventTime is the event time (from the data) of the check that
	// changed the state, in UTC.
	EventTime time.Time `json:"event_time"`
	// Reason is a short human-readable explanation.
	Reason string `json:"reason"`
}

// Defaults of AlarmOptions.
const (
	DefaultAlarmTolerance = 0.1
	DefaultAlarmZ         = 5
	DefaultAlarmRecent    = 96   // a day of 15-minute intervals
	DefaultAlarmReference = 2688 // four weeks of 15-minute intervals
)

// AlarmOptions configures an Alarm. The zero value is the default.
type AlarmOptions struct {
	// Tolerance: the alarm is raised only when the recent coverage is at
	// least this far from its reference (coverage, 0..1). Zero means 0.1;
	// it must lie in (0, 1).
	Tolerance float64
	// ClearTolerance: a raised alarm clears when the recent coverage is
	// back within this of its reference. Zero means Tolerance/2; it must
	// not exceed Tolerance. The gap between the two is the hysteresis that
	// keeps the alarm from flapping.
	ClearTolerance float64
	// Z: the alarm is raised only when the gap is also at least Z times
	// its usual spread (see Alarm). Zero means 5; it must be positive.
	Z float64
	// Recent is the half-life, in outcomes, of the recent coverage. Zero
	// means 96 (a day of 15-minute intervals; four days of hourly ones); it
	// must be at least 1. Half-lives count outcomes, not hours: the recent
	// coverage then always weighs about as many outcomes, so its usual
	// spread means the same whatever the meter's interval or the hours of
	// dark. (Tried in event time, a day's half-life on hourly data weighed
	// a dozen PV outcomes and raised 5 to 10 times as many alarms on the
	// open data sets.)
	Recent float64
	// Reference is the half-life, in outcomes, of the longer-run coverage
	// and of the spread of the recent one around it. Zero means 2688 (four
	// weeks of 15-minute intervals); it must exceed Recent.
	Reference float64
	// MinSamples is the fewest outcomes before the alarm changes state
	// either way (a model warming up is not a drift). Zero means
	// Reference/4 (a week of 15-minute intervals); it must not be negative.
	MinSamples int
	// Kind is the alarm kind of the events; "" means KindCoverage. A
	// KindCoverage alarm compares the recent coverage with the target; a
	// KindRawDrift alarm with the coverage's own longer history.
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
	if o.Z == 0 {
		o.Z = DefaultAlarmZ
	}
	if o.Recent == 0 {
		o.Recent = DefaultAlarmRecent
	}
	if o.Reference == 0 {
		o.Reference = DefaultAlarmReference
	}
	if o.MinSamples == 0 {
		o.MinSamples = int(o.Reference / 4)
	}
	if o.Kind == "" {
		o.Kind = KindCoverage
	}
	switch {
	case !(o.Tolerance > 0 && o.Tolerance < 1):
		return o, fmt.Errorf("conformal: alarm tolerance %v is outside (0, 1)", o.Tolerance)
	case !(o.ClearTolerance > 0 && o.ClearTolerance <= o.Tolerance):
		return o, fmt.Errorf("conformal: alarm clear tolerance %v is outside (0, tolerance %v]", o.ClearTolerance, o.Tolerance)
	case !(o.Z > 0) || math.IsInf(o.Z, 0):
		return o, fmt.Errorf("conformal: alarm z %v is not positive and finite", o.Z)
	case !(o.Recent >= 1) || math.IsInf(o.Recent, 0):
		return o, fmt.Errorf("conformal: alarm recent half-life %v is not at least 1 and finite", o.Recent)
	case !(o.Reference > o.Recent) || math.IsInf(o.Reference, 0):
		return o, fmt.Errorf("conformal: alarm reference half-life %v does not exceed the recent one %v", o.Reference, o.Recent)
	case o.MinSamples < 0:
		return o, fmt.Errorf("conformal: alarm min samples %d is negative", o.MinSamples)
	case o.Kind != KindCoverage && o.Kind != KindRawDrift:
		return o, fmt.Errorf("conformal: alarm kind %q is neither %q nor %q", o.Kind, KindCoverage, KindRawDrift)
	}
	return o, nil
}

// Alarm is the hysteresis state machine of one coverage alarm of one (lead
// bucket, level): an exponentially weighted moving average chart (Roberts
// 1959; common practice in statistical process control) whose limits come
// from the coverage's own past.
//
// It keeps a recent coverage (the share of hits, each outcome's weight
// halving every Recent outcomes after it), a longer-run coverage (halving
// every Reference outcomes) and the mean square of the gap between the two
// over the longer half-life: the usual spread of the recent coverage at
// this site, lead bucket and level. The gap the alarm judges is the recent
// coverage minus the target (KindCoverage) or minus the longer-run coverage
// (KindRawDrift); it is raised when that gap is at least Tolerance and at
// least Z times the usual spread, and it clears when the gap is back within
// ClearTolerance.
//
// Why not a test on a window of outcomes against the binomial (Kupiec) or
// batch means: outcomes of one site share their weather errors for days, so
// a week of them holds a handful of independent draws, and those tests,
// checked at every outcome of every lead bucket and level, raised hundreds of
// alarms a year per site on the open data sets with nothing wrong. Scaling
// by the site's own spread makes a windy week or a cloudy spell as ordinary
// as it is; and comparing the raw model with its own history keeps a
// standing bias, long corrected by the calibrator, from raising raw_drift.
//
// Add and Check are O(1) in time and memory. The zero Alarm is not usable:
// build one with NewAlarm. An Alarm is not safe for concurrent use.
type Alarm struct {
	*alarmSpec // shared by every alarm of the same options

	n              int
	rs, rw, fs, fw float64 // recent and longer-run weighted sums of hits and of weights
	vs, vw         float64 // weighted sums of the squared gap and of weights
	raised         bool
	// The last check, reported by Event.
	target, z float64
}

// alarmSpec is what alarms of the same options share: a site has two per
// lead bucket and level, so each holding its own copy cost a site some 24
// KB.
type alarmSpec struct {
	opt    AlarmOptions
	ar, af float64 // the weight left to the past at each outcome, recent and longer-run
}

// specs interns the alarmSpecs by their (resolved) options.
var specs sync.Map // AlarmOptions -> *alarmSpec

func specFor(o AlarmOptions) *alarmSpec {
	if v, ok := specs.Load(o); ok {
		return v.(*alarmSpec)
	}
	v, _ := specs.LoadOrStore(o, &alarmSpec{opt: o, ar: math.Exp2(-1 / o.Recent), af: math.Exp2(-1 / o.Reference)})
	return v.(*alarmSpec)
}

// NewAlarm returns a cleared alarm, or an error for invalid options.
func NewAlarm(o AlarmOptions) (*Alarm, error) {
	o, err := o.resolve()
	if err != nil {
		return nil, err
	}
	return &Alarm{alarmSpec: specFor(o)}, nil
}

// Options returns the options in force, defaults applied.
func (a *Alarm) Options() AlarmOptions { return a.opt }

// Raised reports whether the alarm is raised.
func (a *Alarm) Raised() bool { return a.raised }

// Count returns the number of outcomes seen.
func (a *Alarm) Count() int { return a.n }

// Add records one outcome: hit when the outcome was at or below the
// quantile.
func (a *Alarm) Add(hit bool) {
	x := 0.0
	if hit {
		x = 1
	}
	a.n++
	a.rs = a.ar*a.rs + x
	a.rw = a.ar*a.rw + 1
	a.fs = a.af*a.fs + x
	a.fw = a.af*a.fw + 1
	g := a.rs/a.rw - a.fs/a.fw
	a.vs = a.af*a.vs + g*g
	a.vw = a.af*a.vw + 1
}

// Z returns the last check's gap in units of the usual spread (0 before
// the first check).
func (a *Alarm) Z() float64 { return a.z }

// ref is what the last check compared the recent coverage with: the
// target, or for raw_drift the longer-run coverage (0 before any check).
func (a *Alarm) ref() float64 {
	if a.opt.Kind == KindRawDrift && a.target != 0 {
		return a.LongRun()
	}
	return a.target
}

// Recent returns the recent coverage, 0 before the first outcome.
func (a *Alarm) Recent() float64 {
	if a.n == 0 {
		return 0
	}
	return a.rs / a.rw
}

// LongRun returns the longer-run coverage, 0 before the first outcome.
func (a *Alarm) LongRun() float64 {
	if a.n == 0 {
		return 0
	}
	return a.fs / a.fw
}

// Spread returns the usual spread of the recent coverage around the
// longer-run one (the weighted root mean square of their gap), 0 before
// the first outcome.
func (a *Alarm) Spread() float64 {
	if a.n == 0 {
		return 0
	}
	return math.Sqrt(a.vs / a.vw)
}

// Check evaluates the alarm against the target coverage (in (0, 1); for the
// quantile at level tau the target is tau) and reports whether the state
// changed and whether the alarm is now raised. Below MinSamples outcomes
// the state never changes. It panics on a target outside (0, 1).
func (a *Alarm) Check(target float64) (changed, raised bool) {
	if !validLevel(target) {
		panic("conformal: Alarm.Check needs a target in (0, 1)")
	}
	if a.n == 0 {
		return false, a.raised
	}
	a.target = target
	gap := a.Recent() - a.ref()
	a.z = 0
	if sp := a.Spread(); sp > 0 {
		a.z = gap / sp
	}
	if a.n < a.opt.MinSamples {
		return false, a.raised
	}
	// thresholdSlack keeps rounding from deciding a gap that sits exactly
	// on a threshold.
	const thresholdSlack = 1e-12
	g := math.Abs(gap)
	switch {
	case !a.raised && g >= a.opt.Tolerance-thresholdSlack && math.Abs(a.z) >= a.opt.Z:
		a.raised = true
		return true, true
	case a.raised && g <= a.opt.ClearTolerance+thresholdSlack:
		a.raised = false
		return true, false
	}
	return false, a.raised
}

// what names the coverage the alarm watches, for its reasons.
func (a *Alarm) what() string {
	if a.opt.Kind == KindRawDrift {
		return "raw model coverage (before calibration)"
	}
	return "calibrated coverage"
}

// Event describes the alarm's current state and last check as a payload for
// a site, a quantile level and a lead bucket name, at the given event time
// (taken from the data; stored in UTC). Call it after Check reported a
// change; before any check saw an outcome, Target, Observed, Reference,
// Window, Z and PValue are zero.
func (a *Alarm) Event(site string, level float64, leadBucket string, at time.Time) Event {
	e := Event{
		Site:       site,
		Kind:       a.opt.Kind,
		State:      StateCleared,
		Level:      level,
		LeadBucket: leadBucket,
		Target:     a.target,
		Observed:   a.Recent(),
		Reference:  a.ref(),
		Window:     a.n,
		Z:          a.z,
		PValue:     math.Erfc(math.Abs(a.z) / math.Sqrt2),
		EventTime:  at.UTC(),
	}
	if a.n == 0 {
		e.PValue = 0
	}
	than := "target"
	if a.opt.Kind == KindRawDrift {
		than = "its own history"
	}
	if a.raised {
		e.State = StateRaised
		dir := "below"
		if e.Observed > e.Reference {
			dir = "above"
		}
		e.Reason = fmt.Sprintf("%s %.3f over about the last %.0f outcomes is %s %s %.3f by %.3f, %.1f times its usual spread (limits %.3f and %.1f)",
			a.what(), e.Observed, a.opt.Recent, dir, than, e.Reference, math.Abs(e.Observed-e.Reference), math.Abs(a.z), a.opt.Tolerance, a.opt.Z)
	} else {
		e.Reason = fmt.Sprintf("%s %.3f is back within %.3f of %s %.3f",
			a.what(), e.Observed, a.opt.ClearTolerance, than, e.Reference)
	}
	return e
}

// alarmVersion is the version byte of an Alarm's state. (Version 1 was the
// state of the window-based alarm this one replaced; Monitor skips it.)
const alarmVersion = 2

// alarmStateLen is the length of an alarm state: the version byte, the
// raised flag, the outcome count as a 64-bit integer and nine doubles.
const alarmStateLen = 1 + 1 + 8 + 9*8

// MarshalBinary encodes the alarm's state (not its options): a version byte
// (2), the raised flag (0 or 1), the outcome count as a little-endian
// uint64, then as little-endian doubles the recent and longer-run weighted sums of
// hits and of weights, the weighted sums of the squared gap and of
// weights, and the last check's target, reference and z.
func (a *Alarm) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, alarmStateLen)
	b = append(b, alarmVersion, 0)
	if a.raised {
		b[1] = 1
	}
	b = appendUint64(b, uint64(a.n))
	for _, v := range [...]float64{a.rs, a.rw, a.fs, a.fw, a.vs, a.vw, a.target, a.ref(), a.z} {
		b = appendFloat(b, v)
	}
	return b, nil
}

// UnmarshalBinary restores a state written by MarshalBinary into an alarm
// built by NewAlarm, whose options stay in force. It refuses an unknown
// version, a wrong length or impossible values with an error wrapping
// ErrState, and leaves a unchanged then.
func (a *Alarm) UnmarshalBinary(data []byte) error {
	switch {
	case len(data) == 0:
		return fmt.Errorf("%w: alarm: empty", ErrState)
	case data[0] != alarmVersion:
		return fmt.Errorf("%w: alarm: unknown version %d (this build reads version %d)", ErrState, data[0], alarmVersion)
	case len(data) != alarmStateLen:
		return fmt.Errorf("%w: alarm: %d bytes, want %d", ErrState, len(data), alarmStateLen)
	}
	r := &stateReader{b: data[1:]}
	flag := r.b[0]
	r.b = r.b[1:]
	n := r.uint64()
	var v [9]float64
	for i := range v {
		v[i] = r.float()
	}
	ok := flag <= 1 && n <= math.MaxInt32
	for i, x := range v {
		switch {
		case i < 6: // weighted sums
			ok = ok && x >= 0 && !math.IsInf(x, 0)
		case i < 8: // target and reference
			ok = ok && x >= 0 && x <= 1
		default:
			ok = ok && !math.IsNaN(x) && !math.IsInf(x, 0)
		}
	}
	if ok && n > 0 {
		// Hits never outweigh outcomes; a squared gap is at most 1.
		ok = v[1] > 0 && v[3] > 0 && v[5] > 0 && v[0] <= v[1] && v[2] <= v[3] && v[4] <= v[5]
	}
	spec := a.alarmSpec
	if spec == nil { // a zero Alarm: the default options
		o, _ := AlarmOptions{}.resolve()
		spec = specFor(o)
	}
	next := Alarm{alarmSpec: spec, raised: flag == 1, n: int(n),
		rs: v[0], rw: v[1], fs: v[2], fw: v[3], vs: v[4], vw: v[5], target: v[6], z: v[8]}
	// The reference follows from the rest (and the alarm's kind).
	if ok && math.Float64bits(next.ref()) != math.Float64bits(v[7]) {
		ok = false
	}
	if !ok {
		return fmt.Errorf("%w: alarm: impossible state (flag %d, count %d, values %v)", ErrState, flag, n, v)
	}
	*a = next
	return nil
}
