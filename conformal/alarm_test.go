package conformal

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"
)

var update = flag.Bool("update", false, "rewrite the golden files under testdata/golden")

// hover adds outcomes to w for steps steps so that its coverage swings
// around c by about one outcome either way: misses once it rose above c by
// half an outcome, hits once it fell below by as much. It calls check after
// each outcome and returns how often |coverage - target| crossed tol.
func hover(w *Window, c, target, tol float64, steps int, check func()) (crossings int) {
	down := w.Coverage() > c
	wasOff := math.Abs(w.Coverage()-target) > tol
	half := 0.5 / float64(w.Size())
	for range steps {
		switch cov := w.Coverage(); {
		case cov < c-half:
			down = false
		case cov > c+half:
			down = true
		}
		w.Add(!down)
		check()
		if off := math.Abs(w.Coverage()-target) > tol; off != wasOff {
			crossings++
			wasOff = off
		}
	}
	return crossings
}

// TestCoverageAlarmDoesNotFlap drives the calibrated coverage of a 0.9
// quantile to hover at the raise threshold (0.85), then at the clear
// threshold (0.875), then at the raise threshold again: the alarm must
// change state once per phase although the coverage crosses each threshold
// many times. Without the hysteresis band (ClearTolerance = Tolerance) the
// same sequence makes it flap, which shows the sequence is a real test.
func TestCoverageAlarmDoesNotFlap(t *testing.T) {
	phases := []struct {
		name      string
		hoverAt   float64
		threshold float64
		want      bool // the state after the phase's one change
	}{
		{"at the raise threshold", 0.85, 0.05, true},
		{"at the clear threshold", 0.875, 0.025, false},
		{"at the raise threshold again", 0.85, 0.05, true},
	}
	// Tolerance 0.05, clear 0.025, 96 samples; the significance test is off
	// (PValue 1) because the hovering sequence is built of long runs, which
	// the test discounts as strongly autocorrelated: here only the
	// hysteresis is under test.
	a, err := NewCoverageAlarm(AlarmOptions{PValue: 1})
	if err != nil {
		t.Fatal(err)
	}
	w := NewWindow(400)
	for i := range 400 {
		w.Add(i%10 != 0) // on target
	}
	var changes []bool
	check := func() {
		if changed, raised := a.Check(w, 0.9); changed {
			changes = append(changes, raised)
		}
	}
	for _, p := range phases {
		changes = nil
		hover(w, p.hoverAt, 0.9, p.threshold, 2000, check) // approach
		if n := hover(w, p.hoverAt, 0.9, p.threshold, 8000, check); n < 30 {
			t.Fatalf("%s: the coverage crossed the threshold only %d times; the test does not hover", p.name, n)
		}
		if len(changes) != 1 || changes[0] != p.want {
			t.Errorf("%s: state changes %v, want exactly one to raised=%v", p.name, changes, p.want)
		}
	}

	// The control: no hysteresis band.
	flappy, err := NewCoverageAlarm(AlarmOptions{Tolerance: 0.05, ClearTolerance: 0.05, PValue: 1})
	if err != nil {
		t.Fatal(err)
	}
	w.Reset()
	n := 0
	hover(w, 0.85, 0.9, 0.05, 8000, func() {
		if changed, _ := flappy.Check(w, 0.9); changed {
			n++
		}
	})
	if n < 10 {
		t.Errorf("without hysteresis the alarm changed state only %d times; the hovering sequence is too tame", n)
	}
}

func TestCoverageAlarmNeedsEvidence(t *testing.T) {
	cases := []struct {
		name       string
		opt        AlarmOptions
		size, hits int
		want       bool
	}{
		{"off target and significant", AlarmOptions{}, 200, 160, true},
		{"off target but too few samples", AlarmOptions{}, 95, 50, false},
		{"off target, enough samples, not significant", AlarmOptions{MinSamples: 20}, 30, 24, false},
		{"same, significance not required", AlarmOptions{MinSamples: 20, PValue: 1}, 30, 24, true},
		{"within tolerance", AlarmOptions{}, 1000, 870, false},
		{"exactly at the tolerance, significant", AlarmOptions{}, 400, 340, false},
		{"one outcome beyond the tolerance", AlarmOptions{}, 400, 339, true},
		{"above target counts too", AlarmOptions{Tolerance: 0.02, MinSamples: 10}, 500, 499, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			a, err := NewCoverageAlarm(c.opt)
			if err != nil {
				t.Fatal(err)
			}
			w := NewWindow(c.size)
			addSpread(w, c.size, c.hits)
			changed, raised := a.Check(w, 0.9)
			if raised != c.want || changed != c.want {
				_, p := Kupiec(c.size-c.hits, c.size, 0.1)
				t.Errorf("Check = (%v, %v), want raised %v (coverage %v, Kupiec p %v)", changed, raised, c.want, w.Coverage(), p)
			}
		})
	}
}

// addSpread adds n outcomes to w with hits spread as evenly as possible (no
// runs, so no positive autocorrelation to discount).
func addSpread(w *Window, n, hits int) {
	for i := range n {
		w.Add((i+1)*hits/n > i*hits/n)
	}
}

// TestCoverageAlarmDiscountsRuns: the same coverage, 0.8 for a 0.9 quantile
// over 200 outcomes, is significant when the misses are spread out and not
// when they come in two blocks (what two bad weather days give: two pieces
// of evidence, not forty).
func TestCoverageAlarmDiscountsRuns(t *testing.T) {
	spread, block := NewWindow(200), NewWindow(200)
	addSpread(spread, 200, 160)
	for i := range 200 {
		block.Add(!(i >= 30 && i < 50 || i >= 130 && i < 150))
	}
	a, _ := NewCoverageAlarm(AlarmOptions{})
	if _, raised := a.Check(spread, 0.9); !raised {
		t.Fatal("spread misses: not raised")
	}
	b, _ := NewCoverageAlarm(AlarmOptions{})
	if _, raised := b.Check(block, 0.9); raised {
		t.Fatal("one block of misses: raised")
	}
}

func TestAlarmOptions(t *testing.T) {
	a, err := NewCoverageAlarm(AlarmOptions{})
	if err != nil {
		t.Fatal(err)
	}
	want := AlarmOptions{Tolerance: 0.05, ClearTolerance: 0.025, PValue: 0.01, MinSamples: 96, Batches: 8, Kind: KindCoverage}
	if a.Options() != want {
		t.Errorf("defaults %+v, want %+v", a.Options(), want)
	}
	bad := []struct {
		name string
		opt  AlarmOptions
	}{
		{"negative tolerance", AlarmOptions{Tolerance: -0.1}},
		{"tolerance 1", AlarmOptions{Tolerance: 1}},
		{"clear beyond raise", AlarmOptions{Tolerance: 0.05, ClearTolerance: 0.06}},
		{"negative clear", AlarmOptions{ClearTolerance: -0.01}},
		{"p-value above 1", AlarmOptions{PValue: 1.5}},
		{"NaN p-value", AlarmOptions{PValue: math.NaN()}},
		{"negative min samples", AlarmOptions{MinSamples: -1}},
		{"one batch", AlarmOptions{Batches: 1}},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			if _, err := NewCoverageAlarm(c.opt); err == nil || !strings.HasPrefix(err.Error(), "conformal: alarm") {
				t.Errorf("err = %v, want a conformal: alarm error", err)
			}
		})
	}
}

// raisedEvent is the alarm event the golden file holds: the 0.9 quantile of
// an invented site covered 560 of its last 672 outcomes.
func raisedEvent(t *testing.T) Event {
	t.Helper()
	a, err := NewCoverageAlarm(AlarmOptions{})
	if err != nil {
		t.Fatal(err)
	}
	w := NewWindow(672)
	for i := range 672 {
		w.Add(i%6 != 0) // 112 misses
	}
	if changed, raised := a.Check(w, 0.9); !changed || !raised {
		t.Fatalf("Check = (%v, %v), want a raise", changed, raised)
	}
	at := time.Date(2024, 3, 14, 9, 15, 0, 0, time.FixedZone("UTC+1", 3600))
	return a.Event("demo-wind-01", 0.9, "4h-8h", at)
}

// TestAlarmEventGolden pins the JSON of a raised coverage alarm, a wire
// contract; run with -update to rewrite testdata/golden/alarm_event.json.
func TestAlarmEventGolden(t *testing.T) {
	got, err := json.Marshal(raisedEvent(t))
	if err != nil {
		t.Fatal(err)
	}
	got = append(got, '\n')
	path := filepath.Join(sharedtest.Root(t), "testdata", "golden", "alarm_event.json")
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test ./conformal -run AlarmEventGolden -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("alarm event JSON changed:\n got %s\nwant %s(run with -update if the change is intended)", got, want)
	}
}

func TestAlarmEventContents(t *testing.T) {
	e := raisedEvent(t)
	if e.State != StateRaised || e.Kind != KindCoverage || e.Window != 672 || e.Target != 0.9 || e.Level != 0.9 {
		t.Errorf("event %+v", e)
	}
	if !near(e.Observed, 560.0/672, 1e-15) {
		t.Errorf("observed %v, want %v", e.Observed, 560.0/672)
	}
	// The misses are spread evenly, so the batches vary less than
	// independent outcomes would and the test is the binomial z-test:
	// z = (0.9 - 560/672) / sqrt(0.9 x 0.1 / 672), p = erfc(z / sqrt 2)
	// (two-sided normal tail, computed).
	z := (0.9 - 560.0/672) / math.Sqrt(0.9*0.1/672)
	if p := math.Erfc(z / math.Sqrt2); !near(e.PValue, p, 1e-6*p) || !(p < 0.01) {
		t.Errorf("p-value %v, want the z-test's %v below 0.01", e.PValue, p)
	}
	if want := time.Date(2024, 3, 14, 8, 15, 0, 0, time.UTC); !e.EventTime.Equal(want) || e.EventTime.Location() != time.UTC {
		t.Errorf("event time %v, want %v in UTC", e.EventTime, want)
	}
	if !strings.Contains(e.Reason, "below target 0.900") {
		t.Errorf("reason %q does not say the coverage is below target", e.Reason)
	}
	b, _ := json.Marshal(e)
	var back Event
	if err := json.Unmarshal(b, &back); err != nil || back != e {
		t.Errorf("JSON round trip: %+v, %v; want %+v", back, err, e)
	}
	var fields map[string]any
	if err := json.Unmarshal(b, &fields); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"site", "kind", "state", "level", "lead_bucket", "target", "observed", "window", "p_value", "event_time", "reason"} {
		if _, ok := fields[k]; !ok {
			t.Errorf("JSON lacks %q: %s", k, b)
		}
	}
}

func TestCoverageAlarmStateRoundTrip(t *testing.T) {
	a, _ := NewCoverageAlarm(AlarmOptions{MinSamples: 10})
	w := NewWindow(50)
	addSpread(w, 50, 10)
	a.Check(w, 0.5)
	b, _ := a.MarshalBinary()
	r, _ := NewCoverageAlarm(AlarmOptions{MinSamples: 10})
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	if !reflect.DeepEqual(r.Event("s", 0.5, "0h-1h", at), a.Event("s", 0.5, "0h-1h", at)) || !r.Raised() {
		t.Errorf("restored %+v, want %+v", *r, *a)
	}
	for _, bad := range [][]byte{nil, append([]byte{7}, b[1:]...), b[:20], append([]byte{1, 2}, b[2:]...)} {
		if err := r.UnmarshalBinary(bad); !errors.Is(err, ErrState) {
			t.Errorf("UnmarshalBinary(% x) = %v, want ErrState", bad, err)
		}
	}
}

// TestEventBeforeAnyCheck: an alarm that has seen no outcome still yields an
// event JSON can encode (no NaN).
func TestEventBeforeAnyCheck(t *testing.T) {
	a, _ := NewCoverageAlarm(AlarmOptions{})
	a.Check(NewWindow(5), 0.9) // an empty window changes nothing
	e := a.Event("demo-pv-01", 0.9, "", time.Date(2024, 1, 1, 0, 0, 0, 0, time.UTC))
	if e.State != StateCleared || e.Window != 0 {
		t.Errorf("event %+v", e)
	}
	if _, err := json.Marshal(e); err != nil {
		t.Errorf("json.Marshal: %v", err)
	}
}
