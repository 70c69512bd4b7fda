package backtest

import (
	"context"
	"testing"

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
