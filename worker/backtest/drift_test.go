package backtest

import (
	"context"
	"fmt"
	"reflect"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/stream/history/drift"
	"github.com/plumb-forecast/plumb/worker"
)

// TestDriftScenarioAlarms runs the clean serf-pv-15min history (15-minute
// meter, stack forecaster, aci) and the standard drift scenarios made from
// it (stream/history/drift) through the backtest, and logs each scenario's
// alarms after the change: the first, how long after the change, and how
// many. It holds the false alarms of the clean history to at most one
// raise of each kind per month of scored data (the per-site alarms of an
// exponentially weighted chart: 2 coverage_off and 1 raw_drift in the two
// and a half months scored; the window-based alarms they replaced raised
// dozens), and each scenario's alarms before its change to those of the
// clean history (the change alone moves them), and the meter_flat alarm:
// raised once within a day of the stuck meter and cleared once after it,
// never on the clean history or the other scenarios (checkMeterFlat).
//
// Not held: that a change of output or weather (the step, the drift, the
// weather bias) raises an alarm within a day. The forecaster's
// online layers take up a step in output within days, so the coverage of
// the raw model moves less than a cloudy week moves it, and no alarm of
// coverage can tell the two apart on one site that soon. The test logs how
// far the first day of each change stands out (logFirstDay): the share of
// the clean history's days whose raw coverage, pooled over levels and lead
// buckets, is at least as far off on the same side. An alarm judging one
// day can flag that day only by flagging about that share of ordinary
// days; at one false raise a month (some 3 % of days) only changes whose
// first day is rarer than that can be caught within the day.
func TestDriftScenarioAlarms(t *testing.T) {
	if testing.Short() {
		t.Skip("five backtests of a PV season")
	}
	h, err := history.Load(sharedtest.Data(t, "serf-pv-15min"), history.LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	run := func(hh *history.History, name string) *Report {
		rep, err := Run(context.Background(), hh, Options{Data: name, Variants: []VariantSpec{{"stack", "aci"}, {"stack", "none"}}})
		if err != nil {
			t.Fatal(err)
		}
		return rep
	}
	clean := run(h, "clean")
	months := clean.To.Sub(clean.From).Hours() / (24 * 365.25 / 12)
	checkMeterFlat(t, "clean", drift.Scenario{}, clean.Variants[0].AlarmLog)
	for _, a := range clean.Variants[0].Alarms {
		t.Logf("clean: %s raised %d times in %.1f months", a.Kind, a.Raised, months)
		if float64(a.Raised) > months {
			t.Errorf("clean history: %d %s alarms in %.1f months, more than one a month", a.Raised, a.Kind, months)
		}
	}
	for _, sc := range drift.Standard(h) {
		dh, err := sc.Apply(h)
		if err != nil {
			t.Fatal(err)
		}
		rep := run(dh, sc.Name)
		var before, cleanBefore []AlarmEvent
		first, raises := "none", 0
		for _, e := range rep.Variants[0].AlarmLog {
			if e.Time.Before(sc.ChangeAt) {
				before = append(before, e)
				continue
			}
			if e.State != conformal.StateRaised {
				continue
			}
			if raises == 0 {
				first = fmt.Sprintf("%s (level %.2f, %s) after %s", e.Kind, e.Level, e.LeadBucket, e.Time.Sub(sc.ChangeAt).Round(time.Minute))
			}
			raises++
		}
		for _, e := range clean.Variants[0].AlarmLog {
			if e.Time.Before(sc.ChangeAt) {
				cleanBefore = append(cleanBefore, e)
			}
		}
		if !reflect.DeepEqual(before, cleanBefore) {
			t.Errorf("%s: the alarms before the change differ from the clean history's", sc.Name)
		}
		t.Logf("%s (change at %s): first alarm after it %s; %d raised after it", sc.Name, sc.ChangeAt.Format("2006-01-02 15:04"), first, raises)
		checkMeterFlat(t, sc.Name, sc, rep.Variants[0].AlarmLog)
		logFirstDay(t, sc.Name, sc, rep, clean, 1)
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
// everything; TestCalibratedCoverageOpenData finds 39 to 58 % of the clean
// 3-day windows of the 80 % interval more than 5 points off target), so
// each window is also compared with the same window of the clean history
// (rel): the part of the change the calibration has not
// absorbed. It logs, per scenario and variant, the worst windows of the
// two weeks after the change and the days until the windows stay back for
// the rest of those two weeks, the first alarm after the change with the
// count of raises, and how far the change's first day stands out of the
// clean history's days (logFirstDay); it holds what must be true whatever
// the calibrator: the step change (output down to two thirds) pulls the
// raw model's 90 % interval coverage below 0.85 in some window after it,
// and raises the raw model's coverage on its first day above the clean
// history's.
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
			checkMeterFlat(t, c.site+" clean", drift.Scenario{}, clean.Variants[0].AlarmLog)
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
					if v.Calibrator == "none" {
						logFirstDay(t, c.site+" "+sc.Name, sc, rep, clean, vi)
					}
					if vi == 0 {
						checkMeterFlat(t, c.site+" "+sc.Name, sc, v.AlarmLog)
					}
				}
			}
		})
	}
}

// logFirstDay logs how far the first day of a scenario's change stands out
// of the clean history's days for the raw model (variant vi), and holds
// that a step down in output shows on that day: more outcomes at or below
// the quantiles than on the same day of the clean history.
func logFirstDay(t *testing.T, name string, sc drift.Scenario, rep, clean *Report, vi int) {
	t.Helper()
	shift, cleanShift, share, ok := firstDay(rep, clean, vi, sc.ChangeAt)
	if !ok {
		t.Errorf("%s: no scored day holds the change at %s", name, sc.ChangeAt)
		return
	}
	t.Logf("%s: first day of the change, raw model's mean coverage less level %+.3f (clean history's same day %+.3f); %.0f%% of the clean history's days are at least as far off on that side",
		name, shift, cleanShift, 100*share)
	if sc.Kind == drift.KindStep && !(shift > cleanShift) {
		t.Errorf("%s: the step down did not raise the first day's coverage (%+.3f, clean %+.3f): the measurement misses the change", name, shift, cleanShift)
	}
}

// dayShift is one day's mean over the levels of coverage less level: above
// zero the outcomes fell at or below the quantiles more often than they
// should (the site made less than forecast), below zero less often.
func dayShift(d Day, levels []float64) float64 {
	s := 0.0
	for j, l := range levels {
		s += float64(d.Hits[j])/float64(d.N) - l
	}
	return s / float64(len(levels))
}

// firstDay measures how far the first UTC day of a change (the day holding
// at) stands out, for variant vi: its shift in rep and in clean (the same
// history without the change), and the share of clean's scored days whose
// shift lies at least as far from zero on the same side as rep's. An alarm
// that judges a site's coverage on one day of outcomes, whatever its
// statistic, cannot flag that day without flagging about that share of
// ordinary days too. ok is false when either report lacks the day.
func firstDay(rep, clean *Report, vi int, at time.Time) (shift, cleanShift, share float64, ok bool) {
	day := at.UTC().Truncate(24 * time.Hour)
	var got, base bool
	for _, d := range rep.Variants[vi].Daily {
		if d.Start.Equal(day) && d.N > 0 {
			shift, got = dayShift(d, rep.Levels), true
		}
	}
	n, as := 0, 0
	for _, d := range clean.Variants[vi].Daily {
		if d.N == 0 {
			continue
		}
		s := dayShift(d, clean.Levels)
		if d.Start.Equal(day) {
			cleanShift, base = s, true
		}
		n++
		if (shift >= 0 && s >= shift) || (shift < 0 && s <= shift) {
			as++
		}
	}
	if !got || !base || n == 0 {
		return 0, 0, 0, false
	}
	return shift, cleanShift, float64(as) / float64(n), true
}

// checkMeterFlat holds the meter_flat alarms of a scenario's alarm log: a
// stuck meter (drift.KindStuck) raises it once, within 24 hours of the
// change, and clears it once, after the stuck stretch; the clean history
// (the zero Scenario) and every other scenario never raise it.
func checkMeterFlat(t *testing.T, name string, sc drift.Scenario, log []AlarmEvent) {
	t.Helper()
	var raised, cleared []time.Time
	for _, e := range log {
		if e.Kind != worker.KindMeterFlat {
			continue
		}
		if e.State == conformal.StateRaised {
			raised = append(raised, e.Time)
		} else {
			cleared = append(cleared, e.Time)
		}
	}
	if sc.Kind != drift.KindStuck {
		if len(raised) > 0 {
			t.Errorf("%s: meter_flat raised %d times (first at %s) with no meter stuck", name, len(raised), raised[0])
		}
		return
	}
	if len(raised) != 1 || len(cleared) != 1 {
		t.Errorf("%s: meter_flat raised at %v and cleared at %v, want once each", name, raised, cleared)
		return
	}
	after := raised[0].Sub(sc.ChangeAt)
	t.Logf("%s: meter_flat raised %s after the change, cleared %s after it", name, after, cleared[0].Sub(sc.ChangeAt))
	if after < 0 || after > 24*time.Hour {
		t.Errorf("%s: meter_flat raised %s after the change, want within 24 h", name, after)
	}
	if end := sc.From.Add(sc.Duration); cleared[0].Before(end) {
		t.Errorf("%s: meter_flat cleared at %s, before the meter moves again at %s", name, cleared[0], end)
	}
}
