package synth

import (
	"bytes"
	"compress/gzip"
	"errors"
	"flag"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"io"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream/history"
)

var update = flag.Bool("update", false, "rewrite testdata/demo from Fleet(FleetOptions{})")

// TestTurbineCurve checks the curve the package doc states: cut-in 3 m/s,
// rated 12 m/s, cut-out 25 m/s, cubic in between (values from that formula).
func TestTurbineCurve(t *testing.T) {
	tests := []struct {
		name string
		v    float64
		want float64
	}{
		{"calm", 0, 0},
		{"below cut-in", 2.99, 0},
		{"at cut-in", 3, 0},
		{"half way", 7.5, (7.5*7.5*7.5 - 27) / (1728 - 27)},
		{"rated", 12, 1},
		{"storm", 24.99, 1},
		{"cut-out", 25, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := turbineCurve(tc.v); math.Abs(got-tc.want) > 1e-12 {
				t.Errorf("turbineCurve(%v) = %v, want %v", tc.v, got, tc.want)
			}
		})
	}
	// The farm curve stays in [0, 1] and rises from cut-in to rated.
	prev := 0.0
	for v := 0.0; v <= 30; v += 0.05 {
		p := farmCurve(v)
		if p < 0 || p > 1 {
			t.Fatalf("farmCurve(%v) = %v outside [0, 1]", v, p)
		}
		if v <= 10 && p < prev {
			t.Fatalf("farmCurve falls at %v m/s below rated", v)
		}
		prev = p
	}
}

func TestValidate(t *testing.T) {
	tests := []struct {
		name string
		o    FleetOptions
		ok   bool
	}{
		{"zero value", FleetOptions{}, true},
		{"no fault", FleetOptions{FaultFactor: 1}, true},
		{"wind fault", FleetOptions{FaultSite: "wind-ketch-bank"}, true},
		{"five-minute meter", FleetOptions{StepMinutes: 5}, true},
		{"negative days", FleetOptions{Days: -1}, false},
		{"too many days", FleetOptions{Days: MaxDays + 1}, false},
		{"step not dividing an hour", FleetOptions{StepMinutes: 7}, false},
		{"negative step", FleetOptions{StepMinutes: -15}, false},
		{"unknown fault site", FleetOptions{FaultSite: "pv-nowhere"}, false},
		{"fault factor above 1", FleetOptions{FaultFactor: 1.5}, false},
		{"negative fault factor", FleetOptions{FaultFactor: -0.5}, false},
		{"start not a whole minute", FleetOptions{Start: DefaultStart().Add(time.Second)}, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.o.Validate()
			if (err == nil) != tc.ok {
				t.Fatalf("Validate() = %v, want ok %v", err, tc.ok)
			}
			if err != nil && !errors.Is(err, ErrOptions) {
				t.Errorf("error %v does not match ErrOptions", err)
			}
		})
	}
}

// demo is the default fleet, generated once for the tests that only read it.
func demo(t *testing.T) *history.History {
	t.Helper()
	return Fleet(FleetOptions{})
}

func siteByID(t *testing.T, h *history.History, id string) model.Site {
	t.Helper()
	for _, s := range h.Sites {
		if s.ID == id {
			return s
		}
	}
	t.Fatalf("no site %s", id)
	return model.Site{}
}

func TestFleetShape(t *testing.T) {
	h := demo(t)
	if len(h.Sites) != 6 {
		t.Fatalf("%d sites, want 6", len(h.Sites))
	}
	for _, s := range h.Sites {
		if err := s.Validate(); err != nil {
			t.Error(err)
		}
		if s.Note != "invented demo site" || !s.HasLocation() || *s.Lat < 43 || *s.Lat > 45 || *s.Lon < -31 || *s.Lon > -29 {
			t.Errorf("site %s: note %q, location off the invented island group", s.ID, s.Note)
		}
	}
	// 28 days x 4 runs a day x 6 sites; 28 days x 96 quarter hours x 6 sites.
	if len(h.Runs) != 28*4*6 || len(h.Readings) != 28*96*6 {
		t.Fatalf("%d runs, %d readings; want %d, %d", len(h.Runs), len(h.Readings), 28*4*6, 28*96*6)
	}
	wantVars := map[model.Kind][]string{
		model.KindPV:   {"cloud_frac", "ghi_wm2", "temp_c"},
		model.KindWind: {"pressure_hpa", "temp_c", "wind_dir_deg", "wind_ms"},
	}
	for i := range h.Runs {
		r := &h.Runs[i]
		if r.IssuedAt.Hour()%6 != 0 || r.IssuedAt.Minute() != 0 {
			t.Fatalf("run issued at %s, want 00, 06, 12 or 18 UTC", r.IssuedAt)
		}
		if k := siteByID(t, h, r.Site).Kind; !slices.Equal(r.Vars, wantVars[k]) {
			t.Fatalf("run of %s: vars %v, want %v", r.Site, r.Vars, wantVars[k])
		}
		if len(r.Rows) != 48 {
			t.Fatalf("run of %s at %s: %d rows, want 48", r.Site, r.IssuedAt, len(r.Rows))
		}
		for j, row := range r.Rows {
			if !row.ValidStart.Equal(r.IssuedAt.Add(time.Duration(j)*time.Hour)) || row.ValidMinutes != 60 {
				t.Fatalf("run of %s at %s row %d: %s + %d min", r.Site, r.IssuedAt, j, row.ValidStart, row.ValidMinutes)
			}
			for k, v := range row.Values {
				if !model.Finite(v) {
					t.Fatalf("run of %s at %s row %d: %s = %v", r.Site, r.IssuedAt, j, r.Vars[k], v)
				}
			}
		}
	}
	first, last := h.Readings[0], h.Readings[len(h.Readings)-1]
	if !first.IntervalStart.Equal(DefaultStart()) || !last.End().Equal(DefaultStart().AddDate(0, 0, 28)) {
		t.Errorf("readings span %s to %s, want 28 days from %s", first.IntervalStart, last.End(), DefaultStart())
	}
}

func TestReadingsWithinBounds(t *testing.T) {
	h := demo(t)
	maxShare := map[string]float64{}
	for _, r := range h.Readings {
		s := siteByID(t, h, r.Site)
		if !(r.PowerMW >= 0 && r.PowerMW <= s.CapacityMW) || r.Availability != 1 || r.IntervalMinutes != 15 {
			t.Fatalf("reading %+v outside [0, %v] MW or not a plain 15-minute reading", r, s.CapacityMW)
		}
		maxShare[r.Site] = max(maxShare[r.Site], r.PowerMW/s.CapacityMW)
		// At 44 N, 30 W in March the sun rises after 07 UTC and sets before
		// 21 UTC (local solar noon is near 14 UTC and the day lasts about
		// 12 h), so every PV interval between 22 and 06 UTC is night.
		if h := r.IntervalStart.Hour(); s.Kind == model.KindPV && (h >= 22 || h < 6) && r.PowerMW != 0 {
			t.Fatalf("PV reading at night: %+v", r)
		}
	}
	for _, s := range h.Sites {
		// Over four weeks every plant nears its capacity at some point (PV
		// at noon under a clear sky gives about 0.6 of capacity).
		want := 0.9
		if s.Kind == model.KindPV {
			want = 0.5
		}
		if maxShare[s.ID] < want {
			t.Errorf("%s never exceeds %.2f of capacity (max %.3f)", s.ID, want, maxShare[s.ID])
		}
	}
}

// hourlyMeter sums each site's readings per hour (MWh x 4 for 15-minute
// readings; only ratios are used).
func hourlyMeter(h *history.History) map[string]map[time.Time]float64 {
	out := map[string]map[time.Time]float64{}
	for _, r := range h.Readings {
		if out[r.Site] == nil {
			out[r.Site] = map[time.Time]float64{}
		}
		out[r.Site][r.IntervalStart.Truncate(time.Hour)] += r.PowerMW
	}
	return out
}

// shortLead returns, per site and hour, the named variable of the newest run
// (leads 0 to 5 h, runs every 6 h).
func shortLead(h *history.History, name string) map[string]map[time.Time]float64 {
	out := map[string]map[time.Time]float64{}
	for i := range h.Runs {
		r := &h.Runs[i]
		j := r.Var(name)
		if j < 0 {
			continue
		}
		if out[r.Site] == nil {
			out[r.Site] = map[time.Time]float64{}
		}
		for _, row := range r.Rows[:6] {
			out[r.Site][row.ValidStart] = row.Values[j]
		}
	}
	return out
}

// normalisedOutput returns the site's output per unit of forecast
// irradiance (short leads), daytime hours only, before and after at.
func normalisedOutput(h *history.History, site string, at time.Time) (before, after float64) {
	power, ghi := hourlyMeter(h)[site], shortLead(h, "ghi_wm2")[site]
	var pb, gb, pa, ga float64
	for hour, g := range ghi {
		p, ok := power[hour]
		if !ok || g < 100 {
			continue
		}
		if hour.Before(at) {
			pb, gb = pb+p, gb+g
		} else {
			pa, ga = pa+p, ga+g
		}
	}
	return pb / gb, pa / ga
}

// TestFaultWeatherNormalised: after FaultFrom, pv-heron-flats gives about
// 2/3 of its output per unit of (forecast) irradiance before it; the other
// PV sites, and the fault site without a fault, keep theirs.
func TestFaultWeatherNormalised(t *testing.T) {
	half := DefaultStart().AddDate(0, 0, 14)
	faulty := demo(t)
	healthy := Fleet(FleetOptions{FaultFactor: 1})
	tests := []struct {
		name string
		h    *history.History
		site string
		want float64
	}{
		{"fault site", faulty, "pv-heron-flats", 2.0 / 3},
		{"neighbour", faulty, "pv-saltcombe", 1},
		{"other neighbour", faulty, "pv-brindle", 1},
		{"fault site without fault", healthy, "pv-heron-flats", 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			before, after := normalisedOutput(tc.h, tc.site, half)
			if ratio := after / before; math.Abs(ratio-tc.want) > 0.05 {
				t.Errorf("output per unit of irradiance after/before = %.3f, want %.3f +- 0.05", ratio, tc.want)
			} else {
				t.Logf("after/before = %.3f", ratio)
			}
		})
	}
	// The weather does not see the fault.
	if !reflect.DeepEqual(faulty.Runs, healthy.Runs) {
		t.Error("the fault changed the weather runs")
	}
}

func TestFaultOnWindSite(t *testing.T) {
	with := Fleet(FleetOptions{FaultSite: "wind-ketch-bank", FaultFactor: 0.5, Days: 4})
	without := Fleet(FleetOptions{FaultFactor: 1, Days: 4})
	from := DefaultStart().AddDate(0, 0, 2)
	var sw, so float64
	for i := range with.Readings {
		a, b := with.Readings[i], without.Readings[i]
		if a.Site != "wind-ketch-bank" {
			if a != b {
				t.Fatalf("site %s changed: %+v vs %+v", a.Site, a, b)
			}
			continue
		}
		if !a.IntervalStart.Before(from) {
			sw, so = sw+a.PowerMW, so+b.PowerMW
		}
	}
	if so == 0 || math.Abs(sw/so-0.5) > 0.02 {
		t.Errorf("wind fault: output ratio %.3f, want 0.5", sw/so)
	}
}

// TestForecastErrorGrowsWithLead compares the runs with the simulated truth
// (hourly means): the error at lead 40 h is well above that at lead 2 h.
func TestForecastErrorGrowsWithLead(t *testing.T) {
	o := FleetOptions{}.withDefaults()
	w := simulate(o)
	runs := w.runs()
	type acc struct{ sum2, n float64 }
	// ghi_wm2 is compared as a clear-sky index (forecast / clear-sky GHI),
	// so that the sun's height at the hours sampled does not weigh in.
	errs := map[string]*[2]acc{"wind_ms": {}, "ghi_wm2": {}, "temp_c": {}}
	leads := [2]int{2, 40}
	for i := range runs {
		r := &runs[i]
		var st *siteTruth
		for s := range w.sites {
			if w.sites[s].spec.id == r.Site {
				st = &w.sites[s]
			}
		}
		for li, lead := range leads {
			row := r.Rows[lead]
			truth := st.hour(int(row.ValidStart.Sub(o.Start).Minutes()))
			for name, a := range errs {
				j := r.Var(name)
				if j < 0 {
					continue
				}
				var want float64
				got := row.Values[j]
				switch name {
				case "wind_ms":
					want = truth.wind
				case "temp_c":
					want = truth.temp
				case "ghi_wm2":
					if truth.ghiClear < 200 {
						continue
					}
					want, got = truth.k, got/truth.ghiClear
				}
				d := got - want
				a[li].sum2 += d * d
				a[li].n++
			}
		}
	}
	for name, a := range errs {
		short, long := math.Sqrt(a[0].sum2/a[0].n), math.Sqrt(a[1].sum2/a[1].n)
		t.Logf("%s: RMSE %.3f at lead 2 h, %.3f at lead 40 h (%v, %v rows)", name, short, long, a[0].n, a[1].n)
		if !(long > 1.8*short) {
			t.Errorf("%s: RMSE %.3f at lead 40 h is not well above %.3f at lead 2 h", name, long, short)
		}
	}
}

// TestWindSitesCorrelated: the three wind farms share the synoptic wind, so
// their hourly outputs are strongly correlated.
func TestWindSitesCorrelated(t *testing.T) {
	hm := hourlyMeter(demo(t))
	sites := []string{"wind-gorse-hill", "wind-tallow-ridge", "wind-ketch-bank"}
	for i := range sites {
		for j := i + 1; j < len(sites); j++ {
			a, b := hm[sites[i]], hm[sites[j]]
			var x, y []float64
			for hour, v := range a {
				x, y = append(x, v), append(y, b[hour])
			}
			c := correlation(x, y)
			if c < 0.6 {
				t.Errorf("%s and %s: correlation %.2f, want above 0.6", sites[i], sites[j], c)
			}
			t.Logf("%s and %s: correlation %.2f", sites[i], sites[j], c)
		}
	}
}

// TestWindRamps: hourly changes of wind output have an RMS of 5 to 14 % of
// capacity; the open gefcom2012-wind farms (shared data, computed with awk
// over meter.csv.gz) show 8 to 10 %.
func TestWindRamps(t *testing.T) {
	h := demo(t)
	hm := hourlyMeter(h)
	for _, s := range h.Sites {
		if s.Kind != model.KindWind {
			continue
		}
		var sum2, n float64
		for hour, p := range hm[s.ID] {
			if q, ok := hm[s.ID][hour.Add(time.Hour)]; ok {
				d := (q - p) / 4 / s.CapacityMW // four 15-minute readings an hour
				sum2 += d * d
				n++
			}
		}
		rms := math.Sqrt(sum2 / n)
		if rms < 0.05 || rms > 0.14 {
			t.Errorf("%s: hourly ramps RMS %.3f of capacity, want 0.05 to 0.14", s.ID, rms)
		}
		t.Logf("%s: hourly ramps RMS %.3f of capacity", s.ID, rms)
	}
}

// TestOddStartAndStep: a start off the hour and 5-minute readings.
func TestOddStartAndStep(t *testing.T) {
	start := time.Date(2026, 3, 2, 3, 7, 0, 0, time.UTC)
	h := Fleet(FleetOptions{Start: start, Days: 2, StepMinutes: 5})
	if len(h.Readings) != 2*288*6 {
		t.Fatalf("%d readings, want %d", len(h.Readings), 2*288*6)
	}
	if r := h.Readings[0]; !r.IntervalStart.Equal(start) || r.IntervalMinutes != 5 {
		t.Errorf("first reading %+v, want a 5-minute interval at %s", r, start)
	}
	// Issue times 06, 12, 18 on day 1, 00 to 18 on day 2, 00 on day 3.
	if len(h.Runs) != 8*6 || !h.Runs[0].IssuedAt.Equal(time.Date(2026, 3, 2, 6, 0, 0, 0, time.UTC)) {
		t.Errorf("%d runs from %s, want 48 from 06 UTC", len(h.Runs), h.Runs[0].IssuedAt)
	}
	for _, r := range h.Readings {
		if r.PowerMW < 0 || r.PowerMW > siteByID(t, h, r.Site).CapacityMW {
			t.Fatalf("reading %+v out of bounds", r)
		}
	}
}

func correlation(x, y []float64) float64 {
	var mx, my float64
	for i := range x {
		mx += x[i]
		my += y[i]
	}
	mx /= float64(len(x))
	my /= float64(len(y))
	var sxy, sxx, syy float64
	for i := range x {
		sxy += (x[i] - mx) * (y[i] - my)
		sxx += (x[i] - mx) * (x[i] - mx)
		syy += (y[i] - my) * (y[i] - my)
	}
	return sxy / math.Sqrt(sxx*syy)
}

func TestDeterministic(t *testing.T) {
	o := FleetOptions{Days: 3}
	a, b := Fleet(o), Fleet(o)
	if !reflect.DeepEqual(a, b) {
		t.Fatal("two fleets from the same options differ")
	}
	o.Seed = 2
	if c := Fleet(o); reflect.DeepEqual(a.Readings, c.Readings) || reflect.DeepEqual(a.Runs, c.Runs) {
		t.Fatal("seed 2 gives the same fleet as seed 1")
	}
}

// content returns a file's bytes, decompressed when it is gzipped: the demo
// is compared on content, so that a change in the compressor alone does not
// fail the test.
func content(t *testing.T, path string) []byte {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run `go test ./model/synth -run DemoUpToDate -update` to write the demo)", err)
	}
	if filepath.Ext(path) != ".gz" {
		return data
	}
	zr, err := gzip.NewReader(bytes.NewReader(data))
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	out, err := io.ReadAll(zr)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return out
}

// TestDemoUpToDate regenerates the default fleet and compares it with
// testdata/demo; with -update it rewrites testdata/demo instead.
func TestDemoUpToDate(t *testing.T) {
	demoDir := filepath.Join(sharedtest.Root(t), "testdata", "demo")
	h := Fleet(FleetOptions{})
	if *update {
		if err := history.Write(demoDir, h); err != nil {
			t.Fatal(err)
		}
		t.Logf("rewrote %s", demoDir)
	}
	fresh := t.TempDir()
	if err := history.Write(fresh, h); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{history.SitesFile, history.WeatherFile + ".gz", history.MeterFile + ".gz"} {
		if !bytes.Equal(content(t, filepath.Join(fresh, f)), content(t, filepath.Join(demoDir, f))) {
			t.Errorf("testdata/demo/%s is out of date: run `go test ./model/synth -run DemoUpToDate -update` and review the change", f)
		}
	}
	var size int64
	for _, f := range []string{history.WeatherFile + ".gz", history.MeterFile + ".gz"} {
		fi, err := os.Stat(filepath.Join(demoDir, f))
		if err != nil {
			t.Fatal(err)
		}
		size += fi.Size()
	}
	if size > 2<<20 {
		t.Errorf("demo weather and meter files take %d bytes, want under 2 MiB", size)
	}
	// What the walk-through loads is what Fleet makes (up to the union of
	// weather variables that the layout gives every run).
	loaded, err := history.Load(demoDir, history.LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(loaded.Readings, h.Readings) || len(loaded.Runs) != len(h.Runs) {
		t.Error("loaded demo differs from Fleet(FleetOptions{})")
	}
}
