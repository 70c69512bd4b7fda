package conformal

import (
	"encoding"
	"encoding/binary"
	"fmt"
	"math"
	"time"
)

// Defaults of MonitorOptions.
const (
	DefaultMonitorWindow   = 672 // a week of 15-minute intervals
	DefaultMonitorHalfLife = 96  // a day of 15-minute intervals
)

// MonitorOptions configures a Monitor. The zero value is the default.
type MonitorOptions struct {
	// Window is the number of latest outcomes the rolling coverages and the
	// coverage tests are taken over. Zero means 672 (a week of 15-minute
	// intervals); it must not be negative.
	Window int
	// HalfLife is the half-life, in outcomes, of the exponentially weighted
	// coverages. Zero means 96 (a day of 15-minute intervals); it must be
	// positive and finite otherwise.
	HalfLife float64
	// Alarm configures the coverage alarm on the calibrated forecast; its
	// Kind is always KindCoverage.
	Alarm AlarmOptions
	// RawAlarm configures the raw-drift alarm on the raw model's coverage;
	// its Kind is always KindRawDrift.
	RawAlarm AlarmOptions
}

// Monitor groups what one (lead bucket, level) of a site needs to watch its
// coverage: rolling and exponentially weighted coverage of the calibrated
// forecast and of the raw forecast before calibration, and the alarm on the
// calibrated coverage. The fields are the monitor's parts, exported for
// reading; do not replace them. They are held by value: one allocation a
// monitor (and its windows' bits), as a site has 152 of them.
//
// A Monitor is not safe for concurrent use.
type Monitor struct {
	// Level is the quantile level, also the target coverage.
	Level float64
	// Calibrated and Raw hold the latest outcomes of the issued (calibrated)
	// quantile and of the raw forecaster's quantile at Level.
	Calibrated, Raw Window
	// CalibratedEW and RawEW are their exponentially weighted coverages.
	CalibratedEW, RawEW EWCoverage
	// Alarm watches the calibrated coverage against the level.
	Alarm Alarm
	// RawAlarm watches the raw model's coverage against its own history
	// (kind KindRawDrift).
	RawAlarm Alarm
}

// NewMonitor returns an empty monitor of a level in (0, 1), or an error for
// a bad level or bad options.
func NewMonitor(level float64, o MonitorOptions) (*Monitor, error) {
	if err := checkLevel(level); err != nil {
		return nil, err
	}
	if o.Window == 0 {
		o.Window = DefaultMonitorWindow
	}
	if o.HalfLife == 0 {
		o.HalfLife = DefaultMonitorHalfLife
	}
	if o.Window < 0 {
		return nil, fmt.Errorf("conformal: monitor window %d is negative", o.Window)
	}
	if !(o.HalfLife > 0) || math.IsInf(o.HalfLife, 0) {
		return nil, fmt.Errorf("conformal: monitor half-life %v is not positive and finite", o.HalfLife)
	}
	co := o.Alarm
	co.Kind = KindCoverage
	alarm, err := NewAlarm(co)
	if err != nil {
		return nil, err
	}
	ro := o.RawAlarm
	ro.Kind = KindRawDrift
	rawAlarm, err := NewAlarm(ro)
	if err != nil {
		return nil, err
	}
	return &Monitor{
		Level:        level,
		Calibrated:   *NewWindow(o.Window),
		Raw:          *NewWindow(o.Window),
		CalibratedEW: *NewEWCoverage(o.HalfLife),
		RawEW:        *NewEWCoverage(o.HalfLife),
		Alarm:        *alarm,
		RawAlarm:     *rawAlarm,
	}, nil
}

// Observe records one settled outcome of the level: the calibrated hit is
// Y <= Issued; the raw hit is PIT <= Level (the raw forecaster's quantile at
// Level is at or above Y), recorded only when PIT is known. An outcome whose
// Y or Issued is NaN is ignored.
func (m *Monitor) Observe(o Outcome) {
	if math.IsNaN(o.Y) || math.IsNaN(o.Issued) {
		return
	}
	m.Record(o.Hit(), !math.IsNaN(o.PIT), o.PIT <= m.Level)
}

// Record records one settled outcome already judged: hit for the calibrated
// quantile and, when rawKnown, rawHit for the raw one. Callers that break
// ties at a point mass (an outcome equal to a clipped quantile) decide the
// hits themselves and use Record.
func (m *Monitor) Record(hit, rawKnown, rawHit bool) {
	m.Calibrated.Add(hit)
	m.CalibratedEW.Add(hit)
	m.Alarm.Add(hit)
	if rawKnown {
		m.Raw.Add(rawHit)
		m.RawEW.Add(rawHit)
		m.RawAlarm.Add(rawHit)
	}
}

// Check runs the coverage alarm against Level; see Alarm.Check.
func (m *Monitor) Check() (changed, raised bool) {
	return m.Alarm.Check(m.Level)
}

// CheckRaw runs the raw-drift alarm.
func (m *Monitor) CheckRaw() (changed, raised bool) {
	return m.RawAlarm.Check(m.Level)
}

// RawEvent is the raw-drift alarm's payload for this monitor's level.
func (m *Monitor) RawEvent(site, leadBucket string, at time.Time) Event {
	return m.RawAlarm.Event(site, m.Level, leadBucket, at)
}

// Event is the alarm's payload for this monitor's level; see Alarm.Event.
func (m *Monitor) Event(site, leadBucket string, at time.Time) Event {
	return m.Alarm.Event(site, m.Level, leadBucket, at)
}

// monitorVersion is the version byte of a Monitor's state. Version 1 held
// the window-based alarms this build's replaced; it is still read (see
// UnmarshalBinary).
const monitorVersion = 2

// MarshalBinary encodes the monitor's state: a version byte (2), the level
// as a little-endian double, then the states of Calibrated, Raw,
// CalibratedEW, RawEW, Alarm and RawAlarm, each preceded by its length as a
// little-endian uint32.
func (m *Monitor) MarshalBinary() ([]byte, error) {
	b := append(make([]byte, 0, 64), monitorVersion)
	b = appendFloat(b, m.Level)
	for _, p := range []encoding.BinaryMarshaler{&m.Calibrated, &m.Raw, &m.CalibratedEW, &m.RawEW, &m.Alarm, &m.RawAlarm} {
		s, err := p.MarshalBinary()
		if err != nil {
			return nil, err
		}
		b = binary.LittleEndian.AppendUint32(b, uint32(len(s)))
		b = append(b, s...)
	}
	return b, nil
}

// UnmarshalBinary restores a state written by MarshalBinary into a monitor
// built by NewMonitor: the level, the windows and EW coverages (their sizes
// and half-lives included) and the alarms' states; the alarms' options stay
// those the monitor was built with. A version 1 state (written before the
// alarms were exponentially weighted charts) restores the level, windows
// and EW coverages and leaves both alarms new and cleared: they judge again
// once they have seen MinSamples outcomes. It refuses a bad state with an
// error wrapping ErrState and leaves m unchanged then.
func (m *Monitor) UnmarshalBinary(data []byte) error {
	if len(data) == 0 {
		return fmt.Errorf("%w: monitor: empty", ErrState)
	}
	version := data[0]
	if version != 1 && version != monitorVersion {
		return fmt.Errorf("%w: monitor: unknown version %d (this build reads versions 1 and %d)", ErrState, version, monitorVersion)
	}
	r := &stateReader{b: data[1:]}
	if len(r.b) < 8 {
		return fmt.Errorf("%w: monitor: %d bytes, too short", ErrState, len(data))
	}
	level := r.float()
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: monitor: level %v is outside (0, 1)", ErrState, level)
	}
	// The alarms keep the options the monitor was built with (the defaults
	// for a zero Monitor).
	opt := func(a *Alarm, kind string) (*Alarm, error) {
		o := AlarmOptions{Kind: kind}
		if a.alarmSpec != nil {
			o = a.opt
		}
		return NewAlarm(o)
	}
	alarm, err := opt(&m.Alarm, KindCoverage)
	if err != nil {
		return err
	}
	rawAlarm, err := opt(&m.RawAlarm, KindRawDrift)
	if err != nil {
		return err
	}
	next := Monitor{Level: level, Alarm: *alarm, RawAlarm: *rawAlarm}
	parts := []encoding.BinaryUnmarshaler{&next.Calibrated, &next.Raw, &next.CalibratedEW, &next.RawEW, &next.Alarm, &next.RawAlarm}
	if version == 1 {
		parts[4], parts[5] = skipState{}, skipState{}
	}
	for _, p := range parts {
		if len(r.b) < 4 {
			return fmt.Errorf("%w: monitor: truncated", ErrState)
		}
		n := binary.LittleEndian.Uint32(r.b)
		r.b = r.b[4:]
		if uint64(n) > uint64(len(r.b)) {
			return fmt.Errorf("%w: monitor: truncated", ErrState)
		}
		if err := p.UnmarshalBinary(r.b[:n]); err != nil {
			return err
		}
		r.b = r.b[n:]
	}
	if len(r.b) != 0 {
		return fmt.Errorf("%w: monitor: %d trailing bytes", ErrState, len(r.b))
	}
	*m = next
	return nil
}

// skipState reads a version 1 window-based alarm's state (a version byte
// 1, then 33 bytes) and drops it.
type skipState struct{}

func (skipState) UnmarshalBinary(b []byte) error {
	if len(b) != 34 || b[0] != 1 {
		return fmt.Errorf("%w: monitor: version 1 alarm state of %d bytes, want 34", ErrState, len(b))
	}
	return nil
}
