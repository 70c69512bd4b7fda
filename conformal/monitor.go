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
	// Alarm configures the coverage alarm on the calibrated forecast.
	Alarm AlarmOptions
	// RawAlarm configures the raw-drift alarm on the raw model's coverage;
	// its zero Tolerance means 0.1 (a raw model that far off keeps the
	// calibrator working hard) and its Kind is always KindRawDrift.
	RawAlarm AlarmOptions
}

// Monitor groups what one (lead bucket, level) of a site needs to watch its
// coverage: rolling and exponentially weighted coverage of the calibrated
// forecast and of the raw forecast before calibration, and the alarm on the
// calibrated coverage. The fields are the monitor's parts, exported for
// reading; do not replace them.
//
// A Monitor is not safe for concurrent use.
type Monitor struct {
	// Level is the quantile level, also the target coverage.
	Level float64
	// Calibrated and Raw hold the latest outcomes of the issued (calibrated)
	// quantile and of the raw forecaster's quantile at Level.
	Calibrated, Raw *Window
	// CalibratedEW and RawEW are their exponentially weighted coverages.
	CalibratedEW, RawEW *EWCoverage
	// Alarm watches the calibrated coverage.
	Alarm *CoverageAlarm
	// RawAlarm watches the raw model's coverage (kind KindRawDrift).
	RawAlarm *CoverageAlarm
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
	alarm, err := NewCoverageAlarm(o.Alarm)
	if err != nil {
		return nil, err
	}
	ro := o.RawAlarm
	ro.Kind = KindRawDrift
	if ro.Tolerance == 0 {
		ro.Tolerance = 0.1
	}
	if ro.MinSamples == 0 {
		ro.MinSamples = o.Alarm.MinSamples
	}
	rawAlarm, err := NewCoverageAlarm(ro)
	if err != nil {
		return nil, err
	}
	return &Monitor{
		Level:        level,
		Calibrated:   NewWindow(o.Window),
		Raw:          NewWindow(o.Window),
		CalibratedEW: NewEWCoverage(o.HalfLife),
		RawEW:        NewEWCoverage(o.HalfLife),
		Alarm:        alarm,
		RawAlarm:     rawAlarm,
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
	if rawKnown {
		m.Raw.Add(rawHit)
		m.RawEW.Add(rawHit)
	}
}

// Check runs the alarm on the calibrated window against Level; see
// CoverageAlarm.Check.
func (m *Monitor) Check() (changed, raised bool) {
	return m.Alarm.Check(m.Calibrated, m.Level)
}

// CheckRaw runs the raw-drift alarm on the raw window against Level.
func (m *Monitor) CheckRaw() (changed, raised bool) {
	return m.RawAlarm.Check(m.Raw, m.Level)
}

// RawEvent is the raw-drift alarm's payload for this monitor's level.
func (m *Monitor) RawEvent(site, leadBucket string, at time.Time) Event {
	return m.RawAlarm.Event(site, m.Level, leadBucket, at)
}

// Event is the alarm's payload for this monitor's level; see
// CoverageAlarm.Event.
func (m *Monitor) Event(site, leadBucket string, at time.Time) Event {
	return m.Alarm.Event(site, m.Level, leadBucket, at)
}

// MarshalBinary encodes the monitor's state: a version byte (1), the level
// as a little-endian double, then the states of Calibrated, Raw,
// CalibratedEW, RawEW, Alarm and RawAlarm, each preceded by its length as a
// little-endian uint32.
func (m *Monitor) MarshalBinary() ([]byte, error) {
	b := append(make([]byte, 0, 64), stateVersion)
	b = appendFloat(b, m.Level)
	for _, p := range []encoding.BinaryMarshaler{m.Calibrated, m.Raw, m.CalibratedEW, m.RawEW, m.Alarm, m.RawAlarm} {
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
// and half-lives included) and the alarm's state; the alarm's options stay
// those the monitor was built with. It refuses a bad state with an error
// wrapping ErrState and leaves m unchanged then.
func (m *Monitor) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("monitor", data, 0)
	if err != nil {
		return err
	}
	if len(r.b) < 8 {
		return fmt.Errorf("%w: monitor: %d bytes, too short", ErrState, len(data))
	}
	level := r.float()
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: monitor: level %v is outside (0, 1)", ErrState, level)
	}
	alarm, rawAlarm := &CoverageAlarm{}, &CoverageAlarm{}
	if m.Alarm != nil {
		alarm.opt = m.Alarm.opt
	} else if alarm.opt, err = (AlarmOptions{}).resolve(); err != nil {
		return err
	}
	if m.RawAlarm != nil {
		rawAlarm.opt = m.RawAlarm.opt
	} else if rawAlarm.opt, err = (AlarmOptions{Tolerance: 0.1, Kind: KindRawDrift}).resolve(); err != nil {
		return err
	}
	next := Monitor{Level: level, Calibrated: &Window{}, Raw: &Window{},
		CalibratedEW: &EWCoverage{}, RawEW: &EWCoverage{}, Alarm: alarm, RawAlarm: rawAlarm}
	for _, p := range []encoding.BinaryUnmarshaler{next.Calibrated, next.Raw, next.CalibratedEW, next.RawEW, next.Alarm, next.RawAlarm} {
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
