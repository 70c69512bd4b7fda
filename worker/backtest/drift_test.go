package backtest

import (
	"context"
	"fmt"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/stream/history/drift"
)

// TestDriftScenariosRaiseAlarms runs the clean serf-pv-15min history and
// the standard drift scenarios made from it (stream/history/drift) through
// the backtest and counts the alarms of the main variant. The step change
// (output down to two thirds) must raise at least twice as many raw_drift
// alarms as the clean history: the alarms see a fault the data did not
// have. The other scenarios are logged (issue 5 will hold them to more).
func TestDriftScenariosRaiseAlarms(t *testing.T) {
	if testing.Short() {
		t.Skip("five backtests of a PV season")
	}
	h, err := history.Load(sharedtest.Data(t, "serf-pv-15min"), history.LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	count := func(hh *history.History, name string) map[string]int {
		rep, err := Run(context.Background(), hh, Options{Data: name, Variants: []VariantSpec{{"baseline", "aci"}}})
		if err != nil {
			t.Fatal(err)
		}
		n := map[string]int{}
		for _, a := range rep.Variants[0].Alarms {
			n[a.Kind] += a.Raised
		}
		t.Logf("%s: coverage_off %d, raw_drift %d", name, n[conformal.KindCoverage], n[conformal.KindRawDrift])
		return n
	}
	clean := count(h, "clean")
	for _, sc := range drift.Standard(h) {
		dh, err := sc.Apply(h)
		if err != nil {
			t.Fatal(err)
		}
		n := count(dh, sc.Name)
		if sc.Kind == drift.KindStep && n[conformal.KindRawDrift] < 2*clean[conformal.KindRawDrift] {
			t.Errorf("%s: %d raw_drift alarms, the clean history %d: the fault is not seen", sc.Name,
				n[conformal.KindRawDrift], clean[conformal.KindRawDrift])
		}
	}
}

// TestDriftRecovery measures, on the standard drift scenarios made from
// serf-pv-15min, how the calibrated 80 % and 90 % central intervals of the
// default forecaster recover after the change (issue 5: back within 5
// points over a rolling 3-day window within 3 days; the static split
// conformal reference should not), when the first coverage alarm comes
// after the change, and how many raises and clears each level sees. It logs
// the figures; it holds the measurement to what must be true whatever the
// calibrator: the step change (output down to two thirds) pulls the raw
// model's 90 % interval coverage down by more than 5 points over the
// three days after it.
func TestDriftRecovery(t *testing.T) {
	if testing.Short() {
		t.Skip("backtests of a PV season under four scenarios")
	}
	h, err := history.Load(sharedtest.Data(t, "serf-pv-15min"), history.LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	variants := []VariantSpec{{"stack", "aci"}, {"stack", "split"}, {"stack", "none"}}
	for _, sc := range drift.Standard(h) {
		dh, err := sc.Apply(h)
		if err != nil {
			t.Fatal(err)
		}
		rep, err := Run(context.Background(), dh, Options{Data: sc.Name, Variants: variants})
		if err != nil {
			t.Fatal(err)
		}
		ivs, nominal := []int{1, 2}, []float64{0.8, 0.9}
		for k, iv := range ivs {
			if got := rep.Variants[0].Intraday.All.Intervals[iv].Nominal; got != nominal[k] {
				t.Fatalf("interval %d is the %v one", iv, got)
			}
		}
		for vi, v := range rep.Variants[:len(variants)] {
			rec := rep.RecoveryAfter(vi, sc.ChangeAt, 3, 0.05, ivs, nominal)
			firstAlarm := "none"
			raises, clears := map[string]int{}, map[string]int{}
			for _, e := range v.AlarmLog {
				if e.Time.Before(sc.ChangeAt) || e.Kind != conformal.KindCoverage {
					continue
				}
				if firstAlarm == "none" && e.State == conformal.StateRaised {
					firstAlarm = e.Time.Sub(sc.ChangeAt).Round(15 * time.Minute).String()
				}
				key := fmt.Sprintf("%v/%s", e.Level, e.LeadBucket)
				if e.State == conformal.StateRaised {
					raises[key]++
				} else {
					clears[key]++
				}
			}
			flapping := 0
			for k, n := range raises {
				if n > 1 || clears[k] > 1 {
					flapping++
				}
			}
			t.Logf("%s %s: 80%%/90%% rolling 3-day coverage before %.3f/%.3f, worst after %.3f/%.3f, back within 5 points for good after %d/%d days; first coverage_off %s after the change; %d (level, bucket) cells raised, %d of them more than once",
				sc.Name, v.Name, rec.Before[0], rec.Before[1], rec.Worst[0], rec.Worst[1], rec.Back[0], rec.Back[1], firstAlarm, len(raises), flapping)
			if sc.Kind == drift.KindStep && v.Calibrator == "none" && rec.Worst[1] > 0.85 {
				t.Errorf("%s: the raw model's 90%% interval never fell below 0.85 (worst %.3f): the measurement misses the change", sc.Name, rec.Worst[1])
			}
		}
	}
}
