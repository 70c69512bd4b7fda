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
// one site of each open data set with real weather forecasts (GEFCom2014
// solar zone1, GEFCom2012 wind wf1; stream/history/drift, the change at
// the middle of the site's data), how the calibrated 80 % and 90 % central
// intervals of the default forecaster fare after the change, against the
// static split conformal reference and the raw model. The issue asks for
// the rolling 3-day coverage back within 5 points of target within 3 days;
// on one site the rolling 3-day coverage of the clean history itself swings
// by 10 to 20 points with the weather (clear or calm spells cover nearly
// everything), so each window is also compared with the same window of the
// clean history (rel): the part of the change the calibration has not
// absorbed. It logs, per scenario and variant, the worst windows of the
// two weeks after the change and the days until the windows stay back for
// the rest of those two weeks, and the first alarm after the change
// with the count of raises; it holds what must be true whatever the
// calibrator: the step change (output down to two thirds) pulls the raw
// model's 90 % interval coverage below 0.85 in some window after it.
func TestDriftRecovery(t *testing.T) {
	if testing.Short() {
		t.Skip("backtests of two sites under four scenarios")
	}
	for _, c := range []struct{ data, site string }{{"gefcom2014-solar", "zone1"}, {"gefcom2012-wind", "wf1"}} {
		t.Run(c.data, func(t *testing.T) {
			t.Parallel()
			h, err := history.Load(sharedtest.Data(t, c.data), history.LoadOptions{Sites: []string{c.site}})
			if err != nil {
				t.Fatal(err)
			}
			variants := []VariantSpec{{"stack", "aci"}, {"stack", "split"}, {"stack", "none"}}
			clean, err := Run(context.Background(), h, Options{Data: "clean", Variants: variants})
			if err != nil {
				t.Fatal(err)
			}
			ivs, nominal := []int{1, 2}, []float64{0.8, 0.9}
			for k, iv := range ivs {
				if got := clean.Variants[0].Intraday.All.Intervals[iv].Nominal; got != nominal[k] {
					t.Fatalf("interval %d is the %v one", iv, got)
				}
			}
			for _, sc := range drift.Standard(h) {
				dh, err := sc.Apply(h)
				if err != nil {
					t.Fatal(err)
				}
				rep, err := Run(context.Background(), dh, Options{Data: sc.Name, Variants: variants})
				if err != nil {
					t.Fatal(err)
				}
				for vi, v := range rep.Variants[:len(variants)] {
					spec := RecoverySpec{At: sc.ChangeAt, Window: 3, Horizon: 14, Tol: 0.05, Intervals: ivs, Nominal: nominal}
					rec, rel := rep.Recovery(vi, spec, nil), rep.Recovery(vi, spec, clean)
					first, raises := "none", 0
					for _, e := range v.AlarmLog {
						if e.Time.Before(sc.ChangeAt) || e.State != conformal.StateRaised {
							continue
						}
						if raises == 0 {
							first = fmt.Sprintf("%s after %s", e.Kind, e.Time.Sub(sc.ChangeAt).Round(time.Minute))
						}
						raises++
					}
					t.Logf("%s %s %s: 80%%/90%% rolling 3-day coverage before %.3f/%.3f, worst in 14 days %.3f/%.3f, back within 5 points to stay after %d/%d days; against the clean history: worst %+.3f/%+.3f, back to stay after %d/%d days; first alarm %s, %d raises after the change",
						c.site, sc.Name, v.Name, rec.Before[0], rec.Before[1], rec.Worst[0], rec.Worst[1], rec.Back[0], rec.Back[1],
						rel.Worst[0], rel.Worst[1], rel.Back[0], rel.Back[1], first, raises)
					if sc.Kind == drift.KindStep && v.Calibrator == "none" && rec.Worst[1] > 0.85 {
						t.Errorf("%s: the raw model's 90%% interval never fell below 0.85 (worst %.3f): the measurement misses the change", sc.Name, rec.Worst[1])
					}
				}
			}
		})
	}
}
