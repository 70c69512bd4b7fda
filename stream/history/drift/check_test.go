package drift

import (
	"fmt"
	"math"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

// This file holds the checks shared by the hand-made and the open-data
// tests. They recompute what each transform should do on their own (by a
// different formula where there is one) and compare every reading and every
// run of the output with the input.

// relTol is the float rounding allowed between a value the transform scaled
// and the value the test expects.
const relTol = 1e-12

// sameFloat is exact equality where two NaNs are equal.
func sameFloat(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }

// closeFloat is equality up to relTol, where two NaNs are equal.
func closeFloat(got, want float64) bool {
	if sameFloat(got, want) {
		return true
	}
	return math.Abs(got-want) <= relTol*math.Max(math.Abs(got), math.Abs(want))
}

func sameReading(a, b *model.Reading) bool {
	return a.Site == b.Site && a.IntervalStart == b.IntervalStart && a.IntervalMinutes == b.IntervalMinutes &&
		sameFloat(a.PowerMW, b.PowerMW) && sameFloat(a.Availability, b.Availability) && a.Curtailed == b.Curtailed
}

// runDiff describes the first difference between two runs, or returns "".
func runDiff(a, b *model.WeatherRun) string {
	if a.Site != b.Site || a.IssuedAt != b.IssuedAt || a.Source != b.Source {
		return fmt.Sprintf("run %s@%s differs from %s@%s", a.Site, a.IssuedAt, b.Site, b.IssuedAt)
	}
	if !slices.Equal(a.Vars, b.Vars) {
		return fmt.Sprintf("run %s@%s: vars %v, want %v", a.Site, a.IssuedAt, a.Vars, b.Vars)
	}
	if len(a.Rows) != len(b.Rows) {
		return fmt.Sprintf("run %s@%s: %d rows, want %d", a.Site, a.IssuedAt, len(a.Rows), len(b.Rows))
	}
	for j := range a.Rows {
		ra, rb := &a.Rows[j], &b.Rows[j]
		if ra.ValidStart != rb.ValidStart || ra.ValidMinutes != rb.ValidMinutes || !slices.EqualFunc(ra.Values, rb.Values, sameFloat) {
			return fmt.Sprintf("run %s@%s row %s: %v, want %v", a.Site, a.IssuedAt, ra.ValidStart, ra.Values, rb.Values)
		}
	}
	return ""
}

// sameHistory fails unless got and want are equal in every field (NaN equal
// to NaN, times compared as values, not only as instants).
func sameHistory(t *testing.T, what string, got, want *history.History) {
	t.Helper()
	if !reflect.DeepEqual(got.Sites, want.Sites) {
		t.Errorf("%s: sites differ", what)
	}
	sameRuns(t, what, got, want)
	if len(got.Readings) != len(want.Readings) {
		t.Fatalf("%s: %d readings, want %d", what, len(got.Readings), len(want.Readings))
	}
	for i := range got.Readings {
		if !sameReading(&got.Readings[i], &want.Readings[i]) {
			t.Fatalf("%s: reading %d is %+v, want %+v", what, i, got.Readings[i], want.Readings[i])
		}
	}
}

func sameRuns(t *testing.T, what string, got, want *history.History) {
	t.Helper()
	if len(got.Runs) != len(want.Runs) {
		t.Fatalf("%s: %d runs, want %d", what, len(got.Runs), len(want.Runs))
	}
	for i := range got.Runs {
		if d := runDiff(&got.Runs[i], &want.Runs[i]); d != "" {
			t.Fatalf("%s: run %d: %s", what, i, d)
		}
	}
}

// checkMeter checks a meter transform: sites and runs as in the input; every
// reading equal to the input's except its power, which must be want(r) when
// want reports the reading changed and unchanged otherwise. It returns how
// many readings want changed.
func checkMeter(t *testing.T, in, out *history.History, want func(r *model.Reading) (float64, bool)) int {
	t.Helper()
	if !reflect.DeepEqual(out.Sites, in.Sites) {
		t.Errorf("sites changed")
	}
	sameRuns(t, "runs of a meter transform", out, in)
	if len(out.Readings) != len(in.Readings) {
		t.Fatalf("%d readings, want %d", len(out.Readings), len(in.Readings))
	}
	changed := 0
	for i := range in.Readings {
		a, b := &in.Readings[i], &out.Readings[i]
		w, ok := want(a)
		if !ok {
			if !sameReading(a, b) {
				t.Fatalf("reading %d (%s %s) changed: %+v, want %+v", i, a.Site, a.IntervalStart, *b, *a)
			}
			continue
		}
		changed++
		c := *b
		c.PowerMW = a.PowerMW
		if !sameReading(a, &c) {
			t.Fatalf("reading %d (%s %s): fields other than the power changed: %+v, want %+v", i, a.Site, a.IntervalStart, *b, *a)
		}
		if !closeFloat(b.PowerMW, w) {
			t.Fatalf("reading %d (%s %s): power %v, want %v (input %v)", i, a.Site, a.IntervalStart, b.PowerMW, w, a.PowerMW)
		}
	}
	return changed
}

// wantStep scales the readings of site starting at or after from.
func wantStep(site string, from time.Time, factor float64) func(r *model.Reading) (float64, bool) {
	return func(r *model.Reading) (float64, bool) {
		if r.Site != site || r.IntervalStart.Before(from) {
			return 0, false
		}
		return r.PowerMW * factor, true
	}
}

// wantDrift computes the drift factor as exp(w log(1-p)), not as a power.
func wantDrift(site string, from time.Time, perWeek float64) func(r *model.Reading) (float64, bool) {
	return func(r *model.Reading) (float64, bool) {
		if r.Site != site || r.IntervalStart.Before(from) {
			return 0, false
		}
		w := r.IntervalStart.Sub(from).Hours() / (7 * 24)
		return r.PowerMW * math.Exp(w*math.Log1p(-perWeek)), true
	}
}

// stuckValue scans the site's readings in time order for the last finite
// one ending at or before from.
func stuckValue(t *testing.T, h *history.History, site string, from time.Time) float64 {
	t.Helper()
	var rs []model.Reading
	for _, r := range h.Readings {
		if r.Site == site && !r.End().After(from) && model.Finite(r.PowerMW) {
			rs = append(rs, r)
		}
	}
	if len(rs) == 0 {
		t.Fatalf("no finite reading of %s ends by %s", site, from)
	}
	slices.SortFunc(rs, func(a, b model.Reading) int {
		if c := a.End().Compare(b.End()); c != 0 {
			return c
		}
		return a.IntervalStart.Compare(b.IntervalStart)
	})
	return rs[len(rs)-1].PowerMW
}

// wantStuck sets every reading of site starting in [from, from+d) to value.
func wantStuck(site string, from time.Time, d time.Duration, value float64) func(r *model.Reading) (float64, bool) {
	return func(r *model.Reading) (float64, bool) {
		if r.Site != site || r.IntervalStart.Before(from) || !r.IntervalStart.Before(from.Add(d)) {
			return 0, false
		}
		return value, true
	}
}

// checkWeather checks WeatherBias: sites and readings as in the input; in
// every run of site issued at or after from, the columns named by vars are
// scaled by factor and the others unchanged; every other run unchanged. It
// returns how many runs were scaled.
func checkWeather(t *testing.T, in, out *history.History, site string, from time.Time, vars []string, factor float64) int {
	t.Helper()
	if !reflect.DeepEqual(out.Sites, in.Sites) {
		t.Errorf("sites changed")
	}
	if len(out.Readings) != len(in.Readings) {
		t.Fatalf("%d readings, want %d", len(out.Readings), len(in.Readings))
	}
	for i := range in.Readings {
		if !sameReading(&out.Readings[i], &in.Readings[i]) {
			t.Fatalf("reading %d changed by a weather bias", i)
		}
	}
	if len(out.Runs) != len(in.Runs) {
		t.Fatalf("%d runs, want %d", len(out.Runs), len(in.Runs))
	}
	scaled := 0
	for i := range in.Runs {
		a, b := &in.Runs[i], &out.Runs[i]
		if a.Site != site || a.IssuedAt.Before(from) {
			if d := runDiff(b, a); d != "" {
				t.Fatalf("run %d outside the bias changed: %s", i, d)
			}
			continue
		}
		scaled++
		if b.Site != a.Site || b.IssuedAt != a.IssuedAt || b.Source != a.Source || !slices.Equal(b.Vars, a.Vars) || len(b.Rows) != len(a.Rows) {
			t.Fatalf("run %d: identity or shape changed", i)
		}
		for j := range a.Rows {
			ra, rb := &a.Rows[j], &b.Rows[j]
			if ra.ValidStart != rb.ValidStart || ra.ValidMinutes != rb.ValidMinutes || len(ra.Values) != len(rb.Values) {
				t.Fatalf("run %d row %d: interval or width changed", i, j)
			}
			for k, name := range a.Vars {
				want := ra.Values[k]
				if slices.Contains(vars, name) {
					want *= factor
				}
				if !closeFloat(rb.Values[k], want) {
					t.Fatalf("run %s@%s row %s %s: %v, want %v (input %v)", a.Site, a.IssuedAt, ra.ValidStart, name, rb.Values[k], want, ra.Values[k])
				}
			}
		}
	}
	return scaled
}

// checkChangeAt checks a scenario's ChangeAt: not before From; every event
// before it the same in both histories; and an input of the site that the
// scenario alters has it as event time.
func checkChangeAt(t *testing.T, s Scenario, in, out *history.History) {
	t.Helper()
	if s.ChangeAt.Before(s.From) {
		t.Fatalf("%s: ChangeAt %s before From %s", s.Name, s.ChangeAt, s.From)
	}
	ei, eo := in.Events(), out.Events()
	if len(ei) != len(eo) {
		t.Fatalf("%s: %d events, want %d", s.Name, len(eo), len(ei))
	}
	for k := range ei {
		if !ei[k].Time.Before(s.ChangeAt) {
			break
		}
		a, b := ei[k], eo[k]
		switch {
		case a.Reading != nil && b.Reading != nil:
			if !sameReading(a.Reading, b.Reading) {
				t.Fatalf("%s: reading event at %s, before ChangeAt %s, differs", s.Name, a.Time, s.ChangeAt)
			}
		case a.Run != nil && b.Run != nil:
			if d := runDiff(b.Run, a.Run); d != "" {
				t.Fatalf("%s: run event before ChangeAt %s differs: %s", s.Name, s.ChangeAt, d)
			}
		default:
			t.Fatalf("%s: event %d is of another type in the output", s.Name, k)
		}
	}
	found := false
	if s.Kind == KindWeatherBias {
		for _, run := range in.Runs {
			found = found || run.Site == s.Site && run.IssuedAt == s.ChangeAt
		}
	} else {
		for _, r := range in.Readings {
			if r.Site != s.Site || r.End() != s.ChangeAt {
				continue
			}
			switch s.Kind {
			case KindStep:
				found = found || !r.IntervalStart.Before(s.From)
			case KindDrift:
				found = found || r.IntervalStart.After(s.From)
			case KindStuck:
				found = found || !r.IntervalStart.Before(s.From) && r.IntervalStart.Before(s.From.Add(s.Duration))
			}
		}
	}
	if !found {
		t.Fatalf("%s: no input of %s that the scenario alters has event time ChangeAt %s", s.Name, s.Site, s.ChangeAt)
	}
}
