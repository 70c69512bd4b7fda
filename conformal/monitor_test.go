package conformal

import (
	"bytes"
	"errors"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"
)

func TestMonitorObserve(t *testing.T) {
	m, err := NewMonitor(0.9, MonitorOptions{Window: 4, HalfLife: 2})
	if err != nil {
		t.Fatal(err)
	}
	outcomes := []Outcome{
		{Y: 1, Issued: 2, PIT: 0.5},            // hit, raw hit
		{Y: 3, Issued: 2, PIT: 0.95},           // miss, raw miss
		{Y: 1, Issued: 1, PIT: 0.9},            // hit (on the quantile), raw hit (on the level)
		{Y: 1, Issued: 2, PIT: math.NaN()},     // hit, raw unknown
		{Y: math.NaN(), Issued: 2, PIT: 0.1},   // ignored
		{Y: 1, Issued: math.NaN(), PIT: 0.1},   // ignored
		{Y: 0, Issued: 0.5, PIT: 0.99},         // hit, raw miss
		{Y: 0, Issued: math.Inf(-1), PIT: 0.2}, // miss (level <= 0 issued -Inf), raw hit
	}
	for _, o := range outcomes {
		m.Observe(o)
	}
	// Calibrated: hit miss hit hit hit miss -> the last 4: hit hit hit miss.
	if m.Calibrated.Count() != 4 || m.Calibrated.Hits() != 3 {
		t.Errorf("calibrated window %d/%d, want 3/4", m.Calibrated.Hits(), m.Calibrated.Count())
	}
	// Raw: hit miss hit miss hit -> the last 4: miss hit miss hit.
	if m.Raw.Count() != 4 || m.Raw.Hits() != 2 {
		t.Errorf("raw window %d/%d, want 2/4", m.Raw.Hits(), m.Raw.Count())
	}
	ew := NewEWCoverage(2)
	for _, h := range []bool{true, false, true, true, true, false} {
		ew.Add(h)
	}
	if m.CalibratedEW != *ew {
		t.Errorf("calibrated EW coverage %v, want %v", m.CalibratedEW.Coverage(), ew.Coverage())
	}
	rawEW := NewEWCoverage(2)
	for _, h := range []bool{true, false, true, false, true} {
		rawEW.Add(h)
	}
	if m.RawEW != *rawEW {
		t.Errorf("raw EW coverage %v, want %v", m.RawEW.Coverage(), rawEW.Coverage())
	}
}

func TestMonitorAlarmAndEvent(t *testing.T) {
	m, err := NewMonitor(0.5, MonitorOptions{Window: 200, Alarm: AlarmOptions{MinSamples: 50}})
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2024, 6, 1, 12, 0, 0, 0, time.UTC)
	for i := range 200 {
		m.Observe(Outcome{Y: float64(i % 4), Issued: 0.5, PIT: 0.5}) // a quarter hits
		if changed, raised := m.Check(); changed {
			if !raised {
				t.Fatalf("outcome %d: the alarm cleared", i)
			}
			e := m.Event("demo-pv-02", "0h-1h", at)
			if e.Level != 0.5 || e.Target != 0.5 || e.LeadBucket != "0h-1h" || e.State != StateRaised || e.Window != i+1 {
				t.Errorf("event %+v", e)
			}
			return
		}
	}
	t.Error("a quarter coverage on a 0.5 quantile never raised the alarm")
}

func TestNewMonitorErrors(t *testing.T) {
	cases := []struct {
		name  string
		level float64
		opt   MonitorOptions
	}{
		{"level 1", 1, MonitorOptions{}},
		{"negative window", 0.5, MonitorOptions{Window: -1}},
		{"negative half-life", 0.5, MonitorOptions{HalfLife: -3}},
		{"bad alarm", 0.5, MonitorOptions{Alarm: AlarmOptions{Z: -2}}},
		{"bad raw alarm", 0.5, MonitorOptions{RawAlarm: AlarmOptions{Tolerance: 2}}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if _, err := NewMonitor(c.level, c.opt); err == nil {
				t.Error("NewMonitor accepted bad input")
			}
		})
	}
	m, err := NewMonitor(0.5, MonitorOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if m.Calibrated.Size() != 672 || m.Raw.Size() != 672 || !near(m.CalibratedEW.HalfLife(), 96, 1e-9) {
		t.Errorf("defaults: window %d, half-life %v", m.Calibrated.Size(), m.CalibratedEW.HalfLife())
	}
}

func TestMonitorStateRoundTrip(t *testing.T) {
	opt := MonitorOptions{Window: 100, HalfLife: 10, Alarm: AlarmOptions{MinSamples: 20}}
	m, _ := NewMonitor(0.8, opt)
	rng := rand.New(rand.NewPCG(9, 9))
	feed := func(m *Monitor, from, n int, r *rand.Rand) (changes int) {
		for k := from; k < from+n; k++ {
			y := r.NormFloat64()
			m.Observe(Outcome{Y: y, Issued: 0.3, PIT: r.Float64()})
			if changed, _ := m.Check(); changed {
				changes++
			}
		}
		return changes
	}
	feed(m, 0, 150, rng)
	b, err := m.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	r, _ := NewMonitor(0.3, MonitorOptions{Alarm: AlarmOptions{MinSamples: 20}})
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	again, _ := r.MarshalBinary()
	if !bytes.Equal(again, b) {
		t.Fatal("the restored monitor encodes differently")
	}
	seed := rng.Uint64()
	c1 := feed(m, 150, 500, rand.New(rand.NewPCG(seed, 1)))
	c2 := feed(r, 150, 500, rand.New(rand.NewPCG(seed, 1)))
	b1, _ := m.MarshalBinary()
	b2, _ := r.MarshalBinary()
	if c1 != c2 || !bytes.Equal(b1, b2) {
		t.Errorf("after the same 500 outcomes: %d and %d alarm changes, states equal %v", c1, c2, bytes.Equal(b1, b2))
	}

	bad := [][]byte{nil, {2}, b[:5], b[:len(b)-1], append(bytes.Clone(b), 0)}
	for _, d := range bad {
		if err := r.UnmarshalBinary(d); !errors.Is(err, ErrState) {
			t.Errorf("UnmarshalBinary of %d bytes = %v, want ErrState", len(d), err)
		}
	}
}

// FuzzMonitorUnmarshal: the monitor decoder must not panic, and a state it
// accepts must encode back to the same bytes.
func FuzzMonitorUnmarshal(f *testing.F) {
	m, _ := NewMonitor(0.9, MonitorOptions{Window: 10})
	for i := range 15 {
		m.Observe(Outcome{Y: float64(i % 3), Issued: 1, PIT: 0.5})
	}
	good, _ := m.MarshalBinary()
	f.Add(good)
	f.Add([]byte{1, 0, 0})
	f.Fuzz(func(t *testing.T, data []byte) {
		var m Monitor
		if !roundTrip(t, &m, data) {
			return
		}
		m.Observe(Outcome{Y: 0, Issued: 1, PIT: 0.5})
		m.Check()
	})
}

// TestMonitorRawDrift: a raw model covering a 0.5 level 80 % of the time
// for weeks (a standing bias) while the calibrated forecast holds the level
// raises nothing; when the raw coverage falls to 20 % raw_drift is raised,
// not coverage_off.
func TestMonitorRawDrift(t *testing.T) {
	m, err := NewMonitor(0.5, MonitorOptions{Window: 400})
	if err != nil {
		t.Fatal(err)
	}
	for i := range 4000 {
		m.Record(i%2 == 0, true, i%5 != 0) // calibrated 50 %, raw 80 %, spread evenly
		if changed, _ := m.Check(); changed {
			t.Fatalf("outcome %d: calibrated coverage on target, yet coverage_off changed", i)
		}
		if changed, _ := m.CheckRaw(); changed {
			t.Fatalf("outcome %d: a standing raw bias changed raw_drift", i)
		}
	}
	raisedAt := -1
	for i := range 400 {
		m.Record(i%2 == 0, true, i%5 == 0) // raw 20 %
		if changed, _ := m.Check(); changed {
			t.Fatal("coverage_off changed")
		}
		if changed, raised := m.CheckRaw(); changed && raised {
			raisedAt = i
			break
		}
	}
	if raisedAt < 0 {
		t.Fatal("raw coverage 0.8 -> 0.2: raw_drift not raised")
	}
	e := m.RawEvent("wind-test", "4h-8h", time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC))
	if e.Kind != KindRawDrift || e.State != StateRaised || !(e.Reference > 0.7) || !(e.Observed < e.Reference-0.1) || !strings.Contains(e.Reason, "raw model") {
		t.Fatalf("event %+v", e)
	}
	// The raw alarm survives a state round trip.
	b, err := m.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	r, _ := NewMonitor(0.5, MonitorOptions{Window: 400})
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if !r.RawAlarm.Raised() || r.Alarm.Raised() {
		t.Fatal("restored monitor lost its alarm states")
	}
	raised := false
	for range 400 {
		r.Record(false, true, false)
		_, raised = r.Check()
		if raised {
			break
		}
	}
	if !raised {
		t.Fatal("a restored monitor cannot run its coverage alarm")
	}
}

// TestMonitorVersion1Migrates: a monitor state of version 1 (written before
// the alarms were exponentially weighted charts, with two 34-byte
// window-based alarm states) restores its level, windows and EW coverages,
// and leaves both alarms new.
func TestMonitorVersion1Migrates(t *testing.T) {
	m, _ := NewMonitor(0.9, MonitorOptions{Window: 10, HalfLife: 3})
	for i := range 25 {
		m.Record(i%4 != 0, true, i%3 != 0)
	}
	v1 := append([]byte{1}, appendFloat(nil, 0.9)...)
	for _, p := range []interface{ MarshalBinary() ([]byte, error) }{&m.Calibrated, &m.Raw, &m.CalibratedEW, &m.RawEW} {
		s, _ := p.MarshalBinary()
		v1 = appendUint32(v1, uint32(len(s)))
		v1 = append(v1, s...)
	}
	old := append([]byte{1, 1}, make([]byte, 32)...) // a raised version 1 alarm
	for range 2 {
		v1 = appendUint32(v1, uint32(len(old)))
		v1 = append(v1, old...)
	}
	r, _ := NewMonitor(0.5, MonitorOptions{})
	if err := r.UnmarshalBinary(v1); err != nil {
		t.Fatal(err)
	}
	if r.Level != 0.9 || r.Calibrated.Hits() != m.Calibrated.Hits() || r.Raw.Count() != m.Raw.Count() || r.RawEW != m.RawEW {
		t.Errorf("restored level %v, windows %d/%d", r.Level, r.Calibrated.Hits(), r.Raw.Count())
	}
	if r.Alarm.Raised() || r.RawAlarm.Raised() || r.Alarm.Count() != 0 {
		t.Error("the version 1 alarms were not replaced by new ones")
	}
	bad := bytes.Clone(v1)
	bad[len(bad)-34] = 2 // the old alarm state's version byte
	if err := r.UnmarshalBinary(bad); !errors.Is(err, ErrState) {
		t.Errorf("a version 1 state with a bad alarm state: %v, want ErrState", err)
	}
}
