package drift

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

// Hand-made histories of invented sites. Every expected value below is
// worked out by hand in the comment beside it.

func ts(t testing.TB, s string) time.Time {
	t.Helper()
	tt, err := time.Parse(time.RFC3339, s)
	if err != nil {
		t.Fatal(err)
	}
	return tt.UTC()
}

// small returns a history of three invented sites:
//
//   - alder-pv: hourly readings 1, 2, NaN, 4, 5, 6 from 2030-03-01T00:00Z;
//     runs issued at 00:00, 02:00 and 04:00 with cloud_frac and ghi_wm2;
//   - brae-wind: hourly readings 0.5, 1.5, 2.5 from 00:00; runs issued at
//     00:00 and 12:00 with u_ms, v_ms and wind_dir_deg only;
//   - cairn-pv: neither readings nor runs.
func small(t testing.TB) *history.History {
	t.Helper()
	t0 := ts(t, "2030-03-01T00:00:00Z")
	h := &history.History{Sites: []model.Site{
		{ID: "alder-pv", Kind: model.KindPV, CapacityMW: 7},
		{ID: "brae-wind", Kind: model.KindWind, CapacityMW: 3},
		{ID: "cairn-pv", Kind: model.KindPV, CapacityMW: 1},
	}}
	for i, p := range []float64{1, 2, math.NaN(), 4, 5, 6} {
		h.Readings = append(h.Readings, model.Reading{Site: "alder-pv", IntervalStart: t0.Add(time.Duration(i) * time.Hour),
			IntervalMinutes: 60, PowerMW: p, Availability: 1})
	}
	for i, p := range []float64{0.5, 1.5, 2.5} {
		h.Readings = append(h.Readings, model.Reading{Site: "brae-wind", IntervalStart: t0.Add(time.Duration(i) * time.Hour),
			IntervalMinutes: 60, PowerMW: p, Availability: 0.9, Curtailed: i == 1})
	}
	for k, ghi := range [][2]float64{{100, 200}, {300, math.NaN()}, {500, 600}} {
		issued := t0.Add(time.Duration(2*k) * time.Hour)
		h.Runs = append(h.Runs, model.WeatherRun{Site: "alder-pv", IssuedAt: issued, Vars: []string{"cloud_frac", "ghi_wm2"},
			Rows: []model.WeatherRow{
				{ValidStart: issued, ValidMinutes: 60, Values: []float64{0.25, ghi[0]}},
				{ValidStart: issued.Add(time.Hour), ValidMinutes: 60, Values: []float64{0.5, ghi[1]}},
			}})
	}
	for k := range 2 {
		issued := t0.Add(time.Duration(12*k) * time.Hour)
		h.Runs = append(h.Runs, model.WeatherRun{Site: "brae-wind", IssuedAt: issued, Vars: []string{"u_ms", "v_ms", "wind_dir_deg"},
			Rows: []model.WeatherRow{
				{ValidStart: issued, ValidMinutes: 60, Values: []float64{4, -2, 296.57}},
				{ValidStart: issued.Add(time.Hour), ValidMinutes: 60, Values: []float64{-6, 8, 143.13}},
			}})
	}
	h.Sort()
	return h
}

// powers returns the site's powers in IntervalStart order.
func powers(h *history.History, site string) []float64 {
	rs := slices.Clone(h.Readings)
	slices.SortFunc(rs, func(a, b model.Reading) int { return a.IntervalStart.Compare(b.IntervalStart) })
	var p []float64
	for _, r := range rs {
		if r.Site == site {
			p = append(p, r.PowerMW)
		}
	}
	return p
}

func checkPowers(t *testing.T, got, want []float64) {
	t.Helper()
	if !slices.EqualFunc(got, want, closeFloat) {
		t.Errorf("powers %v, want %v", got, want)
	}
}

func TestStepChangeSmall(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name   string
		from   string
		factor float64
		want   []float64
	}{
		{"half from the fourth hour", "2030-03-01T03:00:00Z", 0.5, []float64{1, 2, nan, 2, 2.5, 3}},
		{"double from the first reading", "2030-03-01T00:00:00Z", 2, []float64{2, 4, nan, 8, 10, 12}},
		{"two thirds of the last reading only", "2030-03-01T05:00:00Z", 2.0 / 3, []float64{1, 2, nan, 4, 5, 4}},
		{"between two starts: from the next one", "2030-03-01T01:30:00Z", 0.5, []float64{1, 2, nan, 2, 2.5, 3}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := small(t)
			out, err := StepChange(h, "alder-pv", ts(t, tt.from), tt.factor)
			if err != nil {
				t.Fatal(err)
			}
			checkPowers(t, powers(out, "alder-pv"), tt.want)
			checkMeter(t, h, out, wantStep("alder-pv", ts(t, tt.from), tt.factor))
			sameHistory(t, "input after StepChange", h, small(t))
		})
	}
}

func TestSlowDriftSmall(t *testing.T) {
	from := ts(t, "2030-03-01T00:00:00Z")
	h := &history.History{Sites: []model.Site{{ID: "alder-pv", Kind: model.KindPV, CapacityMW: 9}}}
	// Readings of 8 MW at from-1h, from, from+3.5 days, from+1 week and
	// from+2 weeks.
	for _, d := range []time.Duration{-time.Hour, 0, 84 * time.Hour, 168 * time.Hour, 336 * time.Hour} {
		h.Readings = append(h.Readings, model.Reading{Site: "alder-pv", IntervalStart: from.Add(d), IntervalMinutes: 60, PowerMW: 8, Availability: 1})
	}
	tests := []struct {
		name    string
		perWeek float64
		want    []float64
	}{
		// 8 x 0.5^w for w = 0, 1/2, 1, 2: 8, 8/sqrt(2) = 4 sqrt(2), 4, 2.
		{"half a week", 0.5, []float64{8, 8, 4 * math.Sqrt2, 4, 2}},
		// 8 x 2^w: 8, 8 sqrt(2), 16, 32.
		{"negative rate grows", -1, []float64{8, 8, 8 * math.Sqrt2, 16, 32}},
		{"zero rate changes nothing", 0, []float64{8, 8, 8, 8, 8}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			out, err := SlowDrift(h, "alder-pv", from, tt.perWeek)
			if err != nil {
				t.Fatal(err)
			}
			checkPowers(t, powers(out, "alder-pv"), tt.want)
			checkMeter(t, h, out, wantDrift("alder-pv", from, tt.perWeek))
			if got := powers(h, "alder-pv"); !slices.Equal(got, []float64{8, 8, 8, 8, 8}) {
				t.Errorf("input changed: %v", got)
			}
		})
	}
}

func TestWeatherBiasSmall(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name     string
		site     string
		from     string
		variable string
		factor   float64
		scaled   []string // the columns the test expects scaled
		want     map[string][][]float64
	}{
		{
			name: "ghi of the runs from 02:00", site: "alder-pv", from: "2030-03-01T02:00:00Z",
			variable: "ghi_wm2", factor: 0.8, scaled: []string{"ghi_wm2"},
			want: map[string][][]float64{
				"2030-03-01T00:00:00Z": {{0.25, 100}, {0.5, 200}},
				"2030-03-01T02:00:00Z": {{0.25, 240}, {0.5, nan}}, // 300 x 0.8; NaN stays NaN
				"2030-03-01T04:00:00Z": {{0.25, 400}, {0.5, 480}}, // 500 x 0.8, 600 x 0.8
			},
		},
		{
			name: "from between two issues", site: "alder-pv", from: "2030-03-01T03:00:00Z",
			variable: "cloud_frac", factor: 2, scaled: []string{"cloud_frac"},
			want: map[string][][]float64{
				"2030-03-01T00:00:00Z": {{0.25, 100}, {0.5, 200}},
				"2030-03-01T02:00:00Z": {{0.25, 300}, {0.5, nan}},
				"2030-03-01T04:00:00Z": {{0.5, 500}, {1, 600}},
			},
		},
		{
			name: "wind scales u and v, not the direction", site: "brae-wind", from: "2030-03-01T12:00:00Z",
			variable: Wind, factor: 0.5, scaled: []string{"u_ms", "v_ms"},
			want: map[string][][]float64{
				"2030-03-01T00:00:00Z": {{4, -2, 296.57}, {-6, 8, 143.13}},
				"2030-03-01T12:00:00Z": {{2, -1, 296.57}, {-3, 4, 143.13}},
			},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := small(t)
			out, err := WeatherBias(h, tt.site, ts(t, tt.from), tt.variable, tt.factor)
			if err != nil {
				t.Fatal(err)
			}
			for _, run := range out.Runs {
				if run.Site != tt.site {
					continue
				}
				want := tt.want[run.IssuedAt.Format(time.RFC3339)]
				for j, row := range run.Rows {
					if !slices.EqualFunc(row.Values, want[j], closeFloat) {
						t.Errorf("run %s row %d: %v, want %v", run.IssuedAt, j, row.Values, want[j])
					}
				}
			}
			checkWeather(t, h, out, tt.site, ts(t, tt.from), tt.scaled, tt.factor)
			sameHistory(t, "input after WeatherBias", h, small(t))
		})
	}
}

func TestWindPseudoVariable(t *testing.T) {
	t0 := ts(t, "2030-03-01T00:00:00Z")
	run := func(vars []string, values []float64) *history.History {
		return &history.History{
			Sites: []model.Site{{ID: "brae-wind", Kind: model.KindWind, CapacityMW: 3}},
			Runs: []model.WeatherRun{{Site: "brae-wind", IssuedAt: t0, Vars: vars,
				Rows: []model.WeatherRow{{ValidStart: t0, ValidMinutes: 60, Values: values}}}},
		}
	}
	tests := []struct {
		name   string
		vars   []string
		values []float64
		want   []float64 // nil: an error naming errHas
		errHas string
	}{
		{"speed and components", []string{"u_ms", "v_ms", "wind_dir_deg", "wind_ms"}, []float64{3, -4, 323.13, 5},
			[]float64{1.5, -2, 323.13, 2.5}, ""},
		{"speed only", []string{"temp_c", "wind_ms"}, []float64{12, 7}, []float64{12, 3.5}, ""},
		{"10 m components", []string{"ghi_wm2", "u10_ms", "v10_ms"}, []float64{400, 2, 1}, []float64{400, 1, 0.5}, ""},
		{"u without v", []string{"u_ms", "wind_dir_deg"}, []float64{3, 90}, nil, "only one of u_ms and v_ms"},
		{"no wind at all", []string{"ghi_wm2", "temp_c"}, []float64{400, 12}, nil, "holds no wind variable (wind_ms, u_ms/v_ms, u10_ms/v10_ms), only ghi_wm2, temp_c"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := run(tt.vars, tt.values)
			out, err := WeatherBias(h, "brae-wind", t0, Wind, 0.5)
			if tt.want == nil {
				if !errors.Is(err, ErrScenario) || !strings.Contains(err.Error(), tt.errHas) {
					t.Fatalf("error %v, want ErrScenario naming %q", err, tt.errHas)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got := out.Runs[0].Rows[0].Values; !slices.Equal(got, tt.want) {
				t.Errorf("values %v, want %v", got, tt.want)
			}
			if got := h.Runs[0].Rows[0].Values; !slices.Equal(got, tt.values) {
				t.Errorf("input changed to %v", got)
			}
		})
	}
}

func TestStuckMeterSmall(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name  string
		from  string
		d     time.Duration
		stuck float64
		want  []float64
	}{
		// The reading of 02:00 is NaN, so the last finite one before 03:00 is
		// the one of 01:00 (2).
		{"two hours after a gap", "2030-03-01T03:00:00Z", 2 * time.Hour, 2, []float64{1, 2, nan, 2, 2, 6}},
		{"ninety minutes take two starts", "2030-03-01T03:00:00Z", 90 * time.Minute, 2, []float64{1, 2, nan, 2, 2, 6}},
		{"fifty-nine minutes take one", "2030-03-01T03:00:00Z", 59 * time.Minute, 2, []float64{1, 2, nan, 2, 5, 6}},
		{"a missing reading is overwritten", "2030-03-01T02:00:00Z", time.Hour, 2, []float64{1, 2, 2, 4, 5, 6}},
		{"past the end of the data", "2030-03-01T05:00:00Z", 48 * time.Hour, 5, []float64{1, 2, nan, 4, 5, 5}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := small(t)
			from := ts(t, tt.from)
			out, err := StuckMeter(h, "alder-pv", from, tt.d)
			if err != nil {
				t.Fatal(err)
			}
			checkPowers(t, powers(out, "alder-pv"), tt.want)
			if v := stuckValue(t, h, "alder-pv", from); v != tt.stuck {
				t.Fatalf("test helper finds stuck value %v, want %v", v, tt.stuck)
			}
			checkMeter(t, h, out, wantStuck("alder-pv", from, tt.d, tt.stuck))
			sameHistory(t, "input after StuckMeter", h, small(t))
		})
	}
}

func TestErrorsSmall(t *testing.T) {
	at := func(s string) time.Time { return ts(t, s) }
	mid := at("2030-03-01T03:00:00Z")
	tests := []struct {
		name   string
		apply  func(h *history.History) (*history.History, error)
		errHas string
	}{
		{"step: unknown site", func(h *history.History) (*history.History, error) {
			return StepChange(h, "dunmore-pv", mid, 0.5)
		}, "step change at site dunmore-pv: invalid drift scenario: unknown site (the history holds alder-pv, brae-wind, cairn-pv)"},
		{"step: zero factor", func(h *history.History) (*history.History, error) { return StepChange(h, "alder-pv", mid, 0) }, "factor 0: must be a positive finite number"},
		{"step: negative factor", func(h *history.History) (*history.History, error) { return StepChange(h, "alder-pv", mid, -1) }, "factor -1"},
		{"step: NaN factor", func(h *history.History) (*history.History, error) {
			return StepChange(h, "alder-pv", mid, math.NaN())
		}, "factor NaN"},
		{"step: infinite factor", func(h *history.History) (*history.History, error) {
			return StepChange(h, "alder-pv", mid, math.Inf(1))
		}, "factor +Inf"},
		{"step: before the data", func(h *history.History) (*history.History, error) {
			return StepChange(h, "alder-pv", at("2030-02-28T23:00:00Z"), 0.5)
		}, "from 2030-02-28T23:00:00Z is outside the site's meter data, intervals starting 2030-03-01T00:00:00Z to 2030-03-01T05:00:00Z"},
		{"step: after the last start", func(h *history.History) (*history.History, error) {
			return StepChange(h, "alder-pv", at("2030-03-01T05:30:00Z"), 0.5)
		}, "outside the site's meter data"},
		{"step: site without readings", func(h *history.History) (*history.History, error) {
			return StepChange(h, "cairn-pv", mid, 0.5)
		}, "the site has no meter reading"},
		{"drift: rate of one", func(h *history.History) (*history.History, error) { return SlowDrift(h, "alder-pv", mid, 1) }, "rate 1 per week"},
		{"drift: NaN rate", func(h *history.History) (*history.History, error) {
			return SlowDrift(h, "alder-pv", mid, math.NaN())
		}, "rate NaN per week"},
		{"drift: unknown site", func(h *history.History) (*history.History, error) { return SlowDrift(h, "x", mid, 0.01) }, "unknown site"},
		{"drift: after the data", func(h *history.History) (*history.History, error) {
			return SlowDrift(h, "alder-pv", at("2031-01-01T00:00:00Z"), 0.01)
		}, "outside the site's meter data"},
		{"weather: absent variable names the present ones", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "brae-wind", at("2030-03-01T00:00:00Z"), "wind_ms", 0.8)
		}, `variable "wind_ms" is absent from the run issued 2030-03-01T00:00:00Z, which holds u_ms, v_ms, wind_dir_deg`},
		{"weather: zero factor", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "alder-pv", mid, "ghi_wm2", 0)
		}, "factor 0"},
		{"weather: before the first run", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "alder-pv", at("2030-02-28T00:00:00Z"), "ghi_wm2", 0.8)
		}, "outside the site's weather runs, issued 2030-03-01T00:00:00Z to 2030-03-01T04:00:00Z"},
		{"weather: after the last run", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "alder-pv", at("2030-03-01T04:00:01Z"), "ghi_wm2", 0.8)
		}, "outside the site's weather runs"},
		{"weather: site without runs", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "cairn-pv", mid, "ghi_wm2", 0.8)
		}, "the site has no weather run"},
		{"weather: unknown site", func(h *history.History) (*history.History, error) {
			return WeatherBias(h, "x", mid, "ghi_wm2", 0.8)
		}, "unknown site"},
		{"stuck: no reading before", func(h *history.History) (*history.History, error) {
			return StuckMeter(h, "alder-pv", at("2030-03-01T00:00:00Z"), time.Hour)
		}, "no finite reading ends at or before 2030-03-01T00:00:00Z"},
		{"stuck: first reading not yet ended", func(h *history.History) (*history.History, error) {
			return StuckMeter(h, "alder-pv", at("2030-03-01T00:30:00Z"), time.Hour)
		}, "no finite reading ends at or before"},
		{"stuck: zero duration", func(h *history.History) (*history.History, error) { return StuckMeter(h, "alder-pv", mid, 0) }, "duration 0s: must be positive"},
		{"stuck: before the data", func(h *history.History) (*history.History, error) {
			return StuckMeter(h, "alder-pv", at("2030-02-01T00:00:00Z"), time.Hour)
		}, "outside the site's meter data"},
		{"scenario: unknown kind", func(h *history.History) (*history.History, error) {
			return Scenario{Name: "odd", Kind: "melt", Site: "alder-pv", From: mid}.Apply(h)
		}, `scenario "odd": drift: invalid drift scenario: unknown kind "melt"`},
		{"scenario: step without factor", func(h *history.History) (*history.History, error) {
			return Scenario{Name: "step", Kind: KindStep, Site: "alder-pv", From: mid}.Apply(h)
		}, `scenario "step": drift: step change at site alder-pv: invalid drift scenario: factor 0`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := small(t)
			out, err := tt.apply(h)
			if !errors.Is(err, ErrScenario) {
				t.Fatalf("error %v does not match ErrScenario", err)
			}
			if !strings.Contains(err.Error(), tt.errHas) {
				t.Errorf("error %q does not contain %q", err, tt.errHas)
			}
			if out != nil {
				t.Errorf("a history came back with the error")
			}
			sameHistory(t, "input after a failed transform", h, small(t))
		})
	}
}

// days returns a history of alder-pv (PV) and brae-wind (wind) with hourly
// readings from 2030-03-01T00:00Z to 2030-03-05T00:00Z (96 each) and one run
// a day per site issued at 00:00 with 24 hourly rows.
func days(t testing.TB) *history.History {
	t.Helper()
	t0 := ts(t, "2030-03-01T00:00:00Z")
	h := &history.History{Sites: []model.Site{
		{ID: "alder-pv", Kind: model.KindPV, CapacityMW: 7},
		{ID: "brae-wind", Kind: model.KindWind, CapacityMW: 3},
	}}
	for i := range 96 {
		start := t0.Add(time.Duration(i) * time.Hour)
		h.Readings = append(h.Readings,
			model.Reading{Site: "alder-pv", IntervalStart: start, IntervalMinutes: 60, PowerMW: float64(i%24) / 4, Availability: 1},
			model.Reading{Site: "brae-wind", IntervalStart: start, IntervalMinutes: 60, PowerMW: 1 + float64(i%7)/8, Availability: 1})
	}
	for d := range 4 {
		issued := t0.Add(time.Duration(24*d) * time.Hour)
		pv := model.WeatherRun{Site: "alder-pv", IssuedAt: issued, Vars: []string{"ghi_wm2", "temp_c"}}
		wind := model.WeatherRun{Site: "brae-wind", IssuedAt: issued, Vars: []string{"u_ms", "v_ms", "wind_dir_deg", "wind_ms"}}
		for k := range 24 {
			start := issued.Add(time.Duration(k) * time.Hour)
			pv.Rows = append(pv.Rows, model.WeatherRow{ValidStart: start, ValidMinutes: 60, Values: []float64{float64(40 * k), 10}})
			wind.Rows = append(wind.Rows, model.WeatherRow{ValidStart: start, ValidMinutes: 60, Values: []float64{3, 4, 216.87, 5}})
		}
		h.Runs = append(h.Runs, pv, wind)
	}
	h.Sort()
	return h
}

func TestStandardSmall(t *testing.T) {
	h := days(t)
	// The readings span 2030-03-01T00:00 to 2030-03-05T00:00; the midpoint is
	// 2030-03-03T00:00, a midnight and a reading start.
	from := ts(t, "2030-03-03T00:00:00Z")
	hour := func(n int) time.Time { return from.Add(time.Duration(n) * time.Hour) }
	tests := []struct {
		site   string
		driver string
	}{
		{"alder-pv", "ghi_wm2"},
		{"brae-wind", Wind},
	}
	for _, tt := range tests {
		t.Run(tt.site, func(t *testing.T) {
			got, err := StandardFor(h, tt.site)
			if err != nil {
				t.Fatal(err)
			}
			want := []Scenario{
				// ChangeAt: the first rescaled reading starts at From and is
				// known at its end, one hour later.
				{Name: "step-2/3", Kind: KindStep, Site: tt.site, From: from, Factor: 2.0 / 3, ChangeAt: hour(1)},
				// The drift factor is 1 at From: the first changed reading
				// starts an hour later and ends two hours after From.
				{Name: "drift-1pct-week", Kind: KindDrift, Site: tt.site, From: from, PerWeek: 0.01, ChangeAt: hour(2)},
				// The run issued at From is the first biased one.
				{Name: "weather-0.8", Kind: KindWeatherBias, Site: tt.site, From: from, Variable: tt.driver, Factor: 0.8, ChangeAt: from},
				{Name: "stuck-1d", Kind: KindStuck, Site: tt.site, From: from, Duration: 24 * time.Hour, ChangeAt: hour(1)},
			}
			if !slices.Equal(got, want) {
				t.Fatalf("StandardFor(%s):\n got %+v\nwant %+v", tt.site, got, want)
			}
			for _, s := range got {
				out, err := s.Apply(h)
				if err != nil {
					t.Fatalf("%s: %v", s.Name, err)
				}
				checkChangeAt(t, s, h, out)
				if s.Kind == KindStuck {
					// 24 hourly readings in the stuck day, all equal to the
					// reading of 2030-03-02T23:00.
					v := stuckValue(t, h, tt.site, from)
					if n := checkMeter(t, h, out, wantStuck(tt.site, from, 24*time.Hour, v)); n != 24 {
						t.Errorf("stuck readings %d, want 24", n)
					}
				}
			}
			sameHistory(t, "input after Standard", h, days(t))
		})
	}
	if got := Standard(h); !slices.Equal(got, mustStandardFor(t, h, "alder-pv")) {
		t.Errorf("Standard does not pick the first site")
	}
}

func mustStandardFor(t *testing.T, h *history.History, site string) []Scenario {
	t.Helper()
	s, err := StandardFor(h, site)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func TestStandardEmpty(t *testing.T) {
	if s := Standard(&history.History{}); s != nil {
		t.Errorf("Standard of an empty history: %v, want nil", s)
	}
	h := small(t)
	h.Sites = []model.Site{h.Sites[2]} // cairn-pv: no reading
	if s := Standard(h); s != nil {
		t.Errorf("Standard of a site without readings: %v, want nil", s)
	}
	for _, site := range []string{"cairn-pv", "dunmore-pv"} {
		if _, err := StandardFor(small(t), site); !errors.Is(err, ErrScenario) {
			t.Errorf("StandardFor(%s): error %v, want ErrScenario", site, err)
		}
	}
}
