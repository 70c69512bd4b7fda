package worker

import (
	"bytes"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
)

// TestFlatMeter drives the meter_flat check reading by reading: a value
// held inside the band raises once when the run reaches the limit and
// clears once at the first other value; values at no output or near full
// output, curtailed and missing readings and late ones change nothing; a
// gap in the readings neither ends a run nor counts towards the limit;
// float noise does not break one.
func TestFlatMeter(t *testing.T) {
	const capMW = 10.0
	limit := 12 * time.Hour
	t0 := time.Date(2031, 5, 4, 0, 0, 0, 0, time.UTC)
	type in struct {
		at        int // minutes after t0
		mw        float64
		curtailed bool
	}
	hourly := func(from, n int, mw float64) []in {
		var s []in
		for k := range n {
			s = append(s, in{at: (from + k) * 60, mw: mw})
		}
		return s
	}
	cat := func(parts ...[]in) []in {
		var s []in
		for _, p := range parts {
			s = append(s, p...)
		}
		return s
	}
	for _, tc := range []struct {
		name string
		feed []in
		// want: the transitions, as state and event time in minutes after t0
		want []string
	}{
		{"stuck 13 h then moves", cat(hourly(0, 13, 4.2), hourly(13, 1, 4.3)), []string{"raised@720", "cleared@840"}},
		{"stuck 11 h: below the limit", cat(hourly(0, 11, 4.2), hourly(11, 1, 4.3)), nil},
		{"calm for a day", hourly(0, 24, 0), nil},
		{"at 1 % of capacity for a day", hourly(0, 24, 0.1), nil},
		{"at 95 % of capacity for a day", hourly(0, 24, 9.5), nil},
		{"just inside the band", hourly(0, 13, 9.49), []string{"raised@720"}},
		{"float noise", func() []in {
			s := hourly(0, 13, 4.2)
			for k := range s {
				s[k].mw += float64(k%2) * 1e-6
			}
			return s
		}(), []string{"raised@720"}},
		{"a change of a thousandth of capacity", func() []in {
			s := hourly(0, 13, 4.2)
			s[6].mw += 0.01
			return s
		}(), nil},
		{"a gap in the readings", cat(hourly(0, 4, 4.2), hourly(9, 9, 4.2)), []string{"raised@1020"}},
		{"a long gap", cat(hourly(0, 6, 4.2), hourly(54, 5, 4.2)), nil},
		{"missing values", func() []in {
			s := hourly(0, 13, 4.2)
			s[5].mw = math.NaN()
			return s
		}(), []string{"raised@780"}},
		{"curtailed to a set-point", func() []in {
			s := hourly(0, 13, 4.2)
			for k := range s {
				s[k].curtailed = true
			}
			return s
		}(), nil},
		{"a late reading of another value", func() []in {
			s := hourly(0, 13, 4.2)
			s = append(s[:7], append([]in{{at: 2 * 60, mw: 1.1}}, s[7:]...)...)
			return s
		}(), []string{"raised@720"}},
		{"stuck, moves, stuck again", cat(hourly(0, 13, 4.2), hourly(13, 2, 5), hourly(15, 13, 6)), []string{"raised@720", "cleared@840", "raised@1620"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var f flatMeter
			var got []string
			for _, x := range tc.feed {
				r := &model.Reading{Site: "s", IntervalStart: t0.Add(time.Duration(x.at) * time.Minute), IntervalMinutes: 60, PowerMW: x.mw, Availability: 1, Curtailed: x.curtailed}
				e, ok := f.observe("s", r, capMW, limit)
				if !ok {
					continue
				}
				if e.Kind != KindMeterFlat || e.Site != "s" || e.Reason == "" {
					t.Errorf("event %+v", e)
				}
				got = append(got, e.State+"@"+strconv.Itoa(int(e.EventTime.Sub(t0)/time.Minute)))
			}
			if !slices.Equal(got, tc.want) {
				t.Errorf("transitions %v, want %v", got, tc.want)
			}
		})
	}
}

// TestActorMeterFlat: the actor publishes meter_flat with its other alarm
// events, and Config.MeterFlat turns it off when negative.
func TestActorMeterFlat(t *testing.T) {
	site := testSites()[1] // wind
	for _, tc := range []struct {
		limit time.Duration
		want  []string
	}{{0, []string{conformal.StateRaised, conformal.StateCleared}}, {-1, nil}, {20 * time.Hour, nil}} {
		cfg := snapConfig(t, "baseline", conformal.MethodACI)
		cfg.MeterFlat = tc.limit
		a, err := NewActor(site, cfg)
		if err != nil {
			t.Fatal(err)
		}
		t0 := time.Date(2031, 5, 4, 0, 0, 0, 0, time.UTC)
		var got []string
		for k := range 16 {
			mw := 0.3 * site.CapacityMW
			if k == 15 {
				mw = 0.31 * site.CapacityMW
			}
			r := &model.Reading{Site: site.ID, IntervalStart: t0.Add(time.Duration(k) * time.Hour), IntervalMinutes: 60, PowerMW: mw, Availability: 1}
			if err := a.Meter(r); err != nil {
				t.Fatal(err)
			}
			for _, e := range a.Events() {
				if e.Kind == KindMeterFlat {
					got = append(got, e.State)
				}
			}
		}
		if !slices.Equal(got, tc.want) {
			t.Errorf("MeterFlat %s: %v, want %v", tc.limit, got, tc.want)
		}
	}
}

// TestMeterFlatEventGolden holds the meter_flat payloads (raise and clear,
// one JSON object per line, as published on plumb.out.alarms.<site>) to
// testdata/golden/meter_flat_events.json: a wire contract; run with
// -update to rewrite it. The feed: an invented wind farm of 48 MW reading
// 20.16 MW every hour for 13 hours, then 21 MW.
func TestMeterFlatEventGolden(t *testing.T) {
	var f flatMeter
	t0 := time.Date(2026, 3, 9, 6, 0, 0, 0, time.UTC)
	var got []byte
	for k := range 14 {
		mw := 20.16
		if k == 13 {
			mw = 21
		}
		r := &model.Reading{Site: "wind-gorse-hill", IntervalStart: t0.Add(time.Duration(k) * time.Hour), IntervalMinutes: 60, PowerMW: mw, Availability: 1}
		if e, ok := f.observe(r.Site, r, 48, DefaultMeterFlat); ok {
			b, err := json.Marshal(e)
			if err != nil {
				t.Fatal(err)
			}
			got = append(append(got, b...), '\n')
		}
	}
	golden := filepath.Join("..", "testdata", "golden", "meter_flat_events.json")
	if *update {
		if err := os.WriteFile(golden, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(golden)
	if err != nil {
		t.Fatalf("%v (run go test ./worker -run MeterFlatEventGolden -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("meter_flat events differ from %s:\n%s\nwant:\n%s", golden, got, want)
	}
}
