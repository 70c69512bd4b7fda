package conformal

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
)

var update = flag.Bool("update", false, "rewrite the golden files under testdata/golden")

// outcomesPerDay is a day of 15-minute intervals.
const outcomesPerDay = 96

// bernoulli adds n outcomes, each a hit with probability p, to a, checking
// it against target after each; it returns the index (from 0) of the first
// raise and of the first clear among them, -1 where there was none, and
// the number of state changes.
func bernoulli(a *Alarm, rng *rand.Rand, n int, p, target float64) (raise, clear, changes int) {
	raise, clear = -1, -1
	for i := range n {
		a.Add(rng.Float64() < p)
		if changed, raised := a.Check(target); changed {
			changes++
			switch {
			case raised && raise < 0:
				raise = i
			case !raised && clear < 0:
				clear = i
			}
		}
	}
	return raise, clear, changes
}

// TestAlarmSumsByHand: the recent and longer-run coverages are the means of
// the hits weighted 2^(-age / half-life), age in outcomes, and the spread
// the root mean square of their gaps weighted the same way with the longer
// half-life; computed here directly as sums over the outcomes (the
// definitions, not the recursions the alarm runs).
func TestAlarmSumsByHand(t *testing.T) {
	a, err := NewAlarm(AlarmOptions{Recent: 2, Reference: 8})
	if err != nil {
		t.Fatal(err)
	}
	hits := []bool{true, true, false, true, false, false, true, true, true, false, true}
	ewMean := func(x []float64, h float64) float64 {
		var s, sw float64
		for k, v := range x {
			wk := math.Exp2(-float64(len(x)-1-k) / h)
			s += wk * v
			sw += wk
		}
		return s / sw
	}
	var xs, gaps []float64
	for _, h := range hits {
		x := 0.0
		if h {
			x = 1
		}
		xs = append(xs, x)
		g := ewMean(xs, 2) - ewMean(xs, 8)
		gaps = append(gaps, g*g)
		a.Add(h)
	}
	rec, long := ewMean(xs, 2), ewMean(xs, 8)
	spread := math.Sqrt(ewMean(gaps, 8))
	if !near(a.Recent(), rec, 1e-12) || !near(a.LongRun(), long, 1e-12) || !near(a.Spread(), spread, 1e-12) {
		t.Errorf("recent %v long-run %v spread %v, want %v %v %v", a.Recent(), a.LongRun(), a.Spread(), rec, long, spread)
	}
	a.Check(0.5)
	e := a.Event("s", 0.5, "0h-1h", time.Unix(0, 0))
	if !near(e.Z, (rec-0.5)/spread, 1e-12) || e.Reference != 0.5 || e.Window != len(hits) {
		t.Errorf("event z %v reference %v window %d, want %v 0.5 %d", e.Z, e.Reference, e.Window, (rec-0.5)/spread, len(hits))
	}
}

// TestAlarmQuietOnTargetRaisesOnChange: a 0.9 quantile covering 90 % of
// independent outcomes raises nothing over 20 000 of them (the recent
// coverage's spread is about 0.018, so the default 0.1 and 5 spreads are
// some 5.5 standard deviations away); when it starts covering 70 % it is
// raised within a few half-lives, and once back at 90 % it clears, once
// each.
func TestAlarmQuietOnTargetRaisesOnChange(t *testing.T) {
	a, _ := NewAlarm(AlarmOptions{})
	rng := rand.New(rand.NewPCG(1, 2))
	if r, _, n := bernoulli(a, rng, 20000, 0.9, 0.9); n != 0 {
		t.Fatalf("on target: %d changes, the first raise after %d outcomes", n, r)
	}
	r, _, n := bernoulli(a, rng, 2000, 0.7, 0.9)
	if r < 0 || r > 3*outcomesPerDay || n != 1 {
		t.Fatalf("coverage 0.7: raised after %d outcomes, %d changes; want one raise within three days (%d)", r, n, 3*outcomesPerDay)
	}
	t.Logf("coverage 0.9 -> 0.7: raised after %d outcomes (15-minute intervals)", r)
	_, c, n := bernoulli(a, rng, 2000, 0.9, 0.9)
	if c < 0 || n != 1 {
		t.Fatalf("back at 0.9: cleared after %d outcomes, %d changes; want one clear", c, n)
	}
}

// TestAlarmDiscountsWeatherSpells: outcomes of one site come in spells (a
// cloudy week misses the upper quantiles for days on end). A 0.9 quantile
// whose coverage alternates between spells of 0.6 and 1.0 (a quarter and
// three quarters of the time, 0.9 on average) moves its recent coverage by
// 0.3 routinely: that is its usual spread, and no alarm is raised over
// 40 000 outcomes. The same 0.3 drop in a steady quantile raises at once
// (TestAlarmQuietOnTargetRaisesOnChange), and without the spread condition
// (Z tiny) the spells raise many times, which shows the test can fail.
func TestAlarmDiscountsWeatherSpells(t *testing.T) {
	spells := func(a *Alarm) (changes int) {
		rng := rand.New(rand.NewPCG(3, 4))
		for range 40000 / 200 {
			p := 1.0
			if rng.Float64() < 0.25 {
				p = 0.6
			}
			_, _, n := bernoulli(a, rng, 200, p, 0.9)
			changes += n
		}
		return changes
	}
	a, _ := NewAlarm(AlarmOptions{})
	if n := spells(a); n != 0 {
		t.Errorf("weather spells raised or cleared the alarm %d times (spread %.3f)", n, a.Spread())
	}
	b, _ := NewAlarm(AlarmOptions{Z: 1e-9})
	if n := spells(b); n < 10 {
		t.Errorf("without the spread condition only %d changes: the spells are too tame to test it", n)
	}
}

// TestRawDriftIgnoresStandingBias: a raw quantile at level 0.25 that always
// covers 12 % (a standing bias the calibrator corrected long ago) never
// raises raw_drift, where a test against the level would; when it moves to
// 50 % it is raised, and it clears once its own history has caught up.
func TestRawDriftIgnoresStandingBias(t *testing.T) {
	a, _ := NewAlarm(AlarmOptions{Kind: KindRawDrift})
	rng := rand.New(rand.NewPCG(5, 6))
	if _, _, n := bernoulli(a, rng, 20000, 0.12, 0.25); n != 0 {
		t.Fatalf("standing bias: %d changes", n)
	}
	vsTarget, _ := NewAlarm(AlarmOptions{})
	if r, _, _ := bernoulli(vsTarget, rand.New(rand.NewPCG(5, 6)), 20000, 0.12, 0.25); r < 0 {
		t.Fatal("against the target the standing bias raises nothing either: the bias is too small to test")
	}
	r, c, n := bernoulli(a, rng, 20000, 0.5, 0.25)
	if r < 0 || r > 3*outcomesPerDay || c < r || n != 2 {
		t.Fatalf("0.12 -> 0.5: raised after %d, cleared after %d outcomes, %d changes", r, c, n)
	}
	t.Logf("raw coverage 0.12 -> 0.5: raised after %d outcomes, cleared after %d as the history caught up", r, c)
	e := a.Event("pv-test", 0.25, "4h-8h", time.Unix(0, 0))
	if e.Kind != KindRawDrift || !strings.Contains(e.Reason, "its own history") {
		t.Errorf("event %+v", e)
	}
}

// hover steers the recent coverage of a to hover at c (a hit when it is
// below c, a miss otherwise) for n outcomes, checking against target after
// each, and returns the state changes and how often |recent - target|
// crossed tol.
func hover(a *Alarm, c, target, tol float64, n int) (changes, crossings int) {
	wasOff := math.Abs(a.Recent()-target) >= tol
	for range n {
		a.Add(a.Recent() < c)
		if changed, _ := a.Check(target); changed {
			changes++
		}
		if off := math.Abs(a.Recent()-target) >= tol; off != wasOff {
			crossings++
			wasOff = off
		}
	}
	return changes, crossings
}

// TestAlarmDoesNotFlap drives the recent coverage of a 0.9 quantile to
// hover at the raise threshold (0.8), then at the clear threshold (0.85),
// then at the raise threshold again: the alarm changes state once per
// phase although the coverage crosses each threshold many times. Without
// the hysteresis (ClearTolerance = Tolerance) the same sequence flaps.
// Z is tiny so that only the tolerances decide.
func TestAlarmDoesNotFlap(t *testing.T) {
	run := func(o AlarmOptions) (changes []int, crossings int) {
		a, _ := NewAlarm(o)
		hover(a, 0.9, 0.9, 0.1, 2000)
		for _, c := range []float64{0.8, 0.85, 0.8} {
			n, x := hover(a, c, 0.9, 0.1, 3000)
			changes = append(changes, n)
			crossings += x
		}
		return changes, crossings
	}
	changes, crossings := run(AlarmOptions{Z: 1e-9})
	if !reflect.DeepEqual(changes, []int{1, 1, 1}) {
		t.Errorf("changes per phase %v, want [1 1 1]", changes)
	}
	if crossings < 50 {
		t.Errorf("the coverage crossed the raise threshold only %d times; the sequence is too tame", crossings)
	}
	flap, _ := run(AlarmOptions{Z: 1e-9, ClearTolerance: 0.1})
	if flap[0] < 10 {
		t.Errorf("without hysteresis %v changes per phase; the hovering sequence is too tame", flap)
	}
}

// TestAlarmMinSamples: no change of state before MinSamples outcomes.
func TestAlarmMinSamples(t *testing.T) {
	a, _ := NewAlarm(AlarmOptions{MinSamples: 500, Z: 1e-9})
	rng := rand.New(rand.NewPCG(7, 8))
	if r, _, _ := bernoulli(a, rng, 1000, 0.3, 0.9); r != 499 {
		t.Errorf("raised at outcome %d, want 499 (the 500th)", r)
	}
}

func TestAlarmOptions(t *testing.T) {
	a, err := NewAlarm(AlarmOptions{})
	if err != nil {
		t.Fatal(err)
	}
	want := AlarmOptions{Tolerance: 0.1, ClearTolerance: 0.05, Z: 5, Recent: 96, Reference: 2688, MinSamples: 672, Kind: KindCoverage}
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
		{"negative z", AlarmOptions{Z: -1}},
		{"NaN z", AlarmOptions{Z: math.NaN()}},
		{"recent below 1", AlarmOptions{Recent: 0.5}},
		{"NaN recent", AlarmOptions{Recent: math.NaN()}},
		{"reference not beyond recent", AlarmOptions{Recent: 100, Reference: 100}},
		{"infinite reference", AlarmOptions{Reference: math.Inf(1)}},
		{"negative min samples", AlarmOptions{MinSamples: -1}},
		{"unknown kind", AlarmOptions{Kind: "stale"}},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			if _, err := NewAlarm(c.opt); err == nil || !strings.HasPrefix(err.Error(), "conformal: alarm") {
				t.Errorf("err = %v, want a conformal: alarm error", err)
			}
		})
	}
}

// raisedEvent is the alarm event the golden file holds: the 0.9 quantile of
// an invented site covered nine outcomes in ten, evenly, for 2000 outcomes,
// then two in three until the alarm was raised.
func raisedEvent(t *testing.T) Event {
	t.Helper()
	a, err := NewAlarm(AlarmOptions{})
	if err != nil {
		t.Fatal(err)
	}
	for i := range 2000 {
		a.Add(i%10 != 0)
		if changed, _ := a.Check(0.9); changed {
			t.Fatalf("outcome %d: the alarm changed on target", i)
		}
	}
	for i := range 1000 {
		a.Add(i%3 != 0)
		if changed, raised := a.Check(0.9); changed {
			if !raised {
				t.Fatal("the alarm cleared")
			}
			at := time.Date(2024, 3, 14, 9, 15, 0, 0, time.FixedZone("UTC+1", 3600))
			return a.Event("demo-wind-01", 0.9, "4h-8h", at)
		}
	}
	t.Fatal("coverage 2/3 never raised the alarm")
	return Event{}
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
	if e.State != StateRaised || e.Kind != KindCoverage || e.Target != 0.9 || e.Level != 0.9 || e.Reference != 0.9 || e.Window <= 2000 {
		t.Errorf("event %+v", e)
	}
	if !(e.Observed <= 0.8+1e-12) || !(e.Z <= -5) {
		t.Errorf("observed %v, z %v: want at most 0.8 and -5", e.Observed, e.Z)
	}
	if p := math.Erfc(math.Abs(e.Z) / math.Sqrt2); e.PValue != p {
		t.Errorf("p-value %v, want the normal tail of z %v", e.PValue, p)
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
	for _, k := range []string{"site", "kind", "state", "level", "lead_bucket", "target", "observed", "reference", "z", "window", "p_value", "event_time", "reason"} {
		if _, ok := fields[k]; !ok {
			t.Errorf("JSON lacks %q: %s", k, b)
		}
	}
}

func TestAlarmStateRoundTrip(t *testing.T) {
	o := AlarmOptions{MinSamples: 10, Z: 1e-9}
	a, _ := NewAlarm(o)
	rng := rand.New(rand.NewPCG(11, 12))
	bernoulli(a, rng, 50, 0.2, 0.5)
	if !a.Raised() {
		t.Fatal("not raised")
	}
	b, _ := a.MarshalBinary()
	r, _ := NewAlarm(o)
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	if !reflect.DeepEqual(r.Event("s", 0.5, "0h-1h", at), a.Event("s", 0.5, "0h-1h", at)) || !r.Raised() {
		t.Errorf("restored %+v, want %+v", *r, *a)
	}
	seed := rng.Uint64()
	_, c1, n1 := bernoulli(a, rand.New(rand.NewPCG(seed, 1)), 300, 0.5, 0.5)
	_, c2, n2 := bernoulli(r, rand.New(rand.NewPCG(seed, 1)), 300, 0.5, 0.5)
	b1, _ := a.MarshalBinary()
	b2, _ := r.MarshalBinary()
	if c1 != c2 || n1 != n2 || !bytes.Equal(b1, b2) {
		t.Errorf("after the same outcomes: clears %d/%d, changes %d/%d, states equal %v", c1, c2, n1, n2, bytes.Equal(b1, b2))
	}
	old := append([]byte{1}, make([]byte, 33)...) // a version 1 (window-based) state
	for _, bad := range [][]byte{nil, old, append([]byte{7}, b[1:]...), b[:20], append([]byte{2, 2}, b[2:]...), append(bytes.Clone(b), 0)} {
		if err := r.UnmarshalBinary(bad); !errors.Is(err, ErrState) {
			t.Errorf("UnmarshalBinary(% x) = %v, want ErrState", bad, err)
		}
	}
}

// FuzzAlarmUnmarshal: the decoder must not panic, and a state it accepts
// must encode back to the same bytes.
func FuzzAlarmUnmarshal(f *testing.F) {
	a, _ := NewAlarm(AlarmOptions{})
	for i := range 30 {
		a.Add(i%3 == 0)
	}
	good, _ := a.MarshalBinary()
	f.Add(good)
	f.Add([]byte{2, 0})
	f.Fuzz(func(t *testing.T, data []byte) {
		b, _ := NewAlarm(AlarmOptions{})
		if err := b.UnmarshalBinary(data); err != nil {
			return
		}
		again, _ := b.MarshalBinary()
		if !bytes.Equal(again, data) {
			t.Fatalf("re-encoded % x, read % x", again, data)
		}
		b.Add(true)
		b.Check(0.5)
	})
}

// TestEventBeforeAnyCheck: an alarm that has seen no outcome still yields an
// event JSON can encode (no NaN).
func TestEventBeforeAnyCheck(t *testing.T) {
	a, _ := NewAlarm(AlarmOptions{})
	a.Check(0.9) // no outcome: nothing changes
	e := a.Event("demo-pv-01", 0.9, "", time.Date(2024, 1, 1, 0, 0, 0, 0, time.UTC))
	if e.State != StateCleared || e.Window != 0 || e.PValue != 0 {
		t.Errorf("event %+v", e)
	}
	if _, err := json.Marshal(e); err != nil {
		t.Errorf("json.Marshal: %v", err)
	}
}
