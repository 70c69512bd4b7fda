package drift

import (
	"errors"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

// TestSharedData applies the standard scenarios to the three open data sets
// and checks every reading and run of each result against the input.
//
// The data facts used below were read off the files by hand with
// `zcat meter.csv.gz | awk -F, '$1=="<site>"'`: the first site's meter data
// is complete on the day the standard scenarios start (24 hourly readings,
// or 96 quarter-hourly ones for serf-pv-15min), and its weather file holds
// the driver variables named in the table.
func TestSharedData(t *testing.T) {
	tests := []struct {
		name       string
		site       string // the first site of sites.json
		kind       model.Kind
		from       string // the middle of the site's meter data, at midnight UTC
		stuckCount int    // readings in the stuck day
		driverVars []string
	}{
		// wf1 readings start 2009-06-30T23:00 and end 2012-06-26T12:00; the
		// midpoint is 2010-12-28T17:30, whose midnight is a reading start.
		{"gefcom2012-wind", "wf1", model.KindWind, "2010-12-28T00:00:00Z", 24, []string{"u_ms", "v_ms", "wind_ms"}},
		// zone1 readings 2012-04-01T00:00 to 2014-07-01T00:00: midpoint
		// 2013-05-16T12:00.
		{"gefcom2014-solar", "zone1", model.KindPV, "2013-05-16T00:00:00Z", 24, []string{"ghi_wm2"}},
		// serf-east readings 2016-07-01T07:00 to 2016-10-13T11:00: midpoint
		// 2016-08-22T09:00.
		{"serf-pv-15min", "serf-east", model.KindPV, "2016-08-22T00:00:00Z", 96, []string{"ghi_wm2"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			dir := sharedtest.Data(t, tt.name)
			h, err := history.Load(dir, history.LoadOptions{})
			if err != nil {
				t.Fatal(err)
			}
			from := ts(t, tt.from)

			sc := Standard(h)
			names := []string{"step-2/3", "drift-1pct-week", "weather-0.8", "stuck-1d"}
			if len(sc) != len(names) {
				t.Fatalf("Standard returned %d scenarios, want %d", len(sc), len(names))
			}
			for i, s := range sc {
				if s.Name != names[i] || s.Site != tt.site || s.From != from {
					t.Fatalf("scenario %d: %s at %s from %s, want %s at %s from %s", i, s.Name, s.Site, s.From, names[i], tt.site, from)
				}
				out, err := s.Apply(h)
				if err != nil {
					t.Fatalf("%s: %v", s.Name, err)
				}
				again, err := s.Apply(h)
				if err != nil {
					t.Fatalf("%s again: %v", s.Name, err)
				}
				sameHistory(t, s.Name+" applied twice", again, out)
				checkChangeAt(t, s, h, out)

				switch s.Kind {
				case KindStep:
					if s.Factor != 2.0/3 {
						t.Errorf("step factor %v, want 2/3", s.Factor)
					}
					if n := checkMeter(t, h, out, wantStep(tt.site, from, 2.0/3)); n == 0 {
						t.Errorf("step changed no reading")
					}
				case KindDrift:
					if s.PerWeek != 0.01 {
						t.Errorf("drift rate %v, want 0.01", s.PerWeek)
					}
					if n := checkMeter(t, h, out, wantDrift(tt.site, from, 0.01)); n == 0 {
						t.Errorf("drift changed no reading")
					}
				case KindWeatherBias:
					want := "ghi_wm2"
					if tt.kind == model.KindWind {
						want = Wind
					}
					if s.Variable != want || s.Factor != 0.8 {
						t.Errorf("weather bias of %s by %v, want %s by 0.8", s.Variable, s.Factor, want)
					}
					if n := checkWeather(t, h, out, tt.site, from, tt.driverVars, 0.8); n == 0 {
						t.Errorf("weather bias scaled no run")
					}
				case KindStuck:
					if s.Duration != 24*time.Hour {
						t.Errorf("stuck for %v, want 24h", s.Duration)
					}
					v := stuckValue(t, h, tt.site, from)
					if n := checkMeter(t, h, out, wantStuck(tt.site, from, 24*time.Hour, v)); n != tt.stuckCount {
						t.Errorf("stuck readings %d, want %d", n, tt.stuckCount)
					}
				default:
					t.Fatalf("unexpected kind %q", s.Kind)
				}
			}

			// The same transforms on the last site of the data set, a week
			// later, with other parameters.
			last := h.Sites[len(h.Sites)-1].ID
			later := from.Add(7 * 24 * time.Hour)
			out, err := StepChange(h, last, later, 1.25)
			if err != nil {
				t.Fatal(err)
			}
			checkMeter(t, h, out, wantStep(last, later, 1.25))
			if out, err = SlowDrift(h, last, later, 0.05); err != nil {
				t.Fatal(err)
			}
			checkMeter(t, h, out, wantDrift(last, later, 0.05))
			if out, err = StuckMeter(h, last, later, 6*time.Hour); err != nil {
				t.Fatal(err)
			}
			checkMeter(t, h, out, wantStuck(last, later, 6*time.Hour, stuckValue(t, h, last, later)))
			variable := "temp_c" // in the weather files of both PV data sets
			if tt.kind == model.KindWind {
				variable = "wind_ms"
			}
			if out, err = WeatherBias(h, last, later, variable, 1.1); err != nil {
				t.Fatal(err)
			}
			if n := checkWeather(t, h, out, last, later, []string{variable}, 1.1); n == 0 {
				t.Errorf("weather bias of %s scaled no run", variable)
			}

			t.Run("errors", func(t *testing.T) { dataErrors(t, h, tt.site) })

			// Nothing above may have touched the input.
			ref, err := history.Load(dir, history.LoadOptions{})
			if err != nil {
				t.Fatal(err)
			}
			sameHistory(t, "input after every transform", h, ref)
		})
	}
}

// dataErrors checks the argument errors on real data.
func dataErrors(t *testing.T, h *history.History, site string) {
	var first, lastStart time.Time
	for _, r := range h.Readings {
		if r.Site != site {
			continue
		}
		if first.IsZero() || r.IntervalStart.Before(first) {
			first = r.IntervalStart
		}
		if r.IntervalStart.After(lastStart) {
			lastStart = r.IntervalStart
		}
	}
	var vars []string
	for _, run := range h.Runs {
		if run.Site == site {
			vars = run.Vars
			break
		}
	}
	mid := Standard(h)[0].From
	tests := []struct {
		name   string
		apply  func() (*history.History, error)
		errHas string
	}{
		{"unknown site", func() (*history.History, error) { return StepChange(h, "dunmore-pv", mid, 0.5) }, "unknown site"},
		{"zero factor", func() (*history.History, error) { return StepChange(h, site, mid, 0) }, "factor 0"},
		{"an hour before the data", func() (*history.History, error) {
			return SlowDrift(h, site, first.Add(-time.Hour), 0.01)
		}, "outside the site's meter data"},
		{"after the last reading", func() (*history.History, error) {
			return StepChange(h, site, lastStart.Add(time.Minute), 0.5)
		}, "outside the site's meter data"},
		{"stuck at the first reading", func() (*history.History, error) {
			return StuckMeter(h, site, first, time.Hour)
		}, "no finite reading ends at or before"},
		{"absent weather variable", func() (*history.History, error) {
			return WeatherBias(h, site, mid, "snow_cm", 0.8)
		}, "which holds " + strings.Join(vars, ", ")},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			out, err := tt.apply()
			if !errors.Is(err, ErrScenario) || !strings.Contains(err.Error(), tt.errHas) {
				t.Fatalf("error %v, want ErrScenario containing %q", err, tt.errHas)
			}
			if out != nil {
				t.Errorf("a history came back with the error")
			}
		})
	}
}
