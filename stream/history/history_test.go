package history

import (
	"bytes"
	"compress/gzip"
	"errors"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"io"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

func mustTime(t testing.TB, s string) time.Time {
	t.Helper()
	tt, err := time.Parse(time.RFC3339, s)
	if err != nil {
		t.Fatal(err)
	}
	return tt.UTC()
}

// TestLoadSharedData loads the three open data sets. The expected counts were
// obtained by hand with `zcat FILE | wc -l` minus one header line (rows), and
// `zcat weather.csv.gz | awk -F, 'NR>1{k[$1","$2]++} END{print length(k)}'`
// (runs); the first and last rows with `zcat FILE | tail -n +2 | sort -t,
// -k2,2 -k1,1` (the sort Load applies).
func TestLoadSharedData(t *testing.T) {
	type spot struct {
		site, issued, start string
		vars                []string
		values              []float64 // in the order of vars
	}
	tests := []struct {
		name                       string
		sites, runs, rows, reading int
		firstRun, lastRun          spot
		firstReading, lastReading  model.Reading
	}{
		{
			name: "gefcom2012-wind", sites: 4, runs: 8736, rows: 419328, reading: 75028,
			firstRun: spot{"wf1", "2009-07-01T00:00:00Z", "2009-07-01T00:00:00Z",
				[]string{"u_ms", "v_ms", "wind_ms", "wind_dir_deg"}, []float64{2.34, -0.79, 2.47, 108.68}},
			lastRun: spot{"wf4", "2012-06-26T12:00:00Z", "2012-06-28T11:00:00Z",
				[]string{"u_ms", "v_ms", "wind_ms", "wind_dir_deg"}, []float64{-2.03, 2.28, 3.05, 318.31}},
			firstReading: model.Reading{Site: "wf1", IntervalMinutes: 60, PowerMW: 0.045},
			lastReading:  model.Reading{Site: "wf4", IntervalMinutes: 60, PowerMW: 0.011},
		},
		{
			name: "gefcom2014-solar", sites: 3, runs: 2403, rows: 57672, reading: 59112,
			firstRun: spot{"zone1", "2012-04-01T00:00:00Z", "2012-04-01T00:00:00Z",
				[]string{"ghi_wm2", "temp_c", "cloud_frac", "precip_mm"}, []float64{716.064, 21.2985, 0.244601, 0}},
			lastRun: spot{"zone3", "2014-06-30T00:00:00Z", "2014-06-30T23:00:00Z",
				[]string{"ghi_wm2", "temp_c", "cloud_ice_kgm2"}, []float64{302.554, 6.49551, 0.00377607}},
			firstReading: model.Reading{Site: "zone1", IntervalMinutes: 60, PowerMW: 0.754103},
			lastReading:  model.Reading{Site: "zone3", IntervalMinutes: 60, PowerMW: 0.561675},
		},
		{
			name: "serf-pv-15min", sites: 1, runs: 10000, rows: 10000, reading: 10000,
			firstRun: spot{"serf-east", "2016-07-01T07:00:00Z", "2016-07-01T07:00:00Z",
				[]string{"ghi_wm2", "temp_c"}, []float64{0, 14.5}},
			lastRun: spot{"serf-east", "2016-10-13T10:45:00Z", "2016-10-13T10:45:00Z",
				[]string{"ghi_wm2", "temp_c"}, []float64{0, 7}},
			firstReading: model.Reading{Site: "serf-east", IntervalMinutes: 15, PowerMW: 0},
			lastReading:  model.Reading{Site: "serf-east", IntervalMinutes: 15, PowerMW: 0},
		},
	}
	readingStarts := map[string][2]string{
		"gefcom2012-wind":  {"2009-06-30T23:00:00Z", "2012-06-26T11:00:00Z"},
		"gefcom2014-solar": {"2012-04-01T00:00:00Z", "2014-06-30T23:00:00Z"},
		"serf-pv-15min":    {"2016-07-01T07:00:00Z", "2016-10-13T10:45:00Z"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			dir := sharedtest.Data(t, tc.name)
			h, err := Load(dir, LoadOptions{})
			if err != nil {
				t.Fatal(err)
			}
			rows := 0
			for i := range h.Runs {
				rows += len(h.Runs[i].Rows)
			}
			if len(h.Sites) != tc.sites || len(h.Runs) != tc.runs || rows != tc.rows || len(h.Readings) != tc.reading {
				t.Fatalf("got %d sites, %d runs, %d weather rows, %d readings; want %d, %d, %d, %d",
					len(h.Sites), len(h.Runs), rows, len(h.Readings), tc.sites, tc.runs, tc.rows, tc.reading)
			}
			checkSorted(t, h)
			checkSpot(t, "first run", &h.Runs[0], &h.Runs[0].Rows[0], tc.firstRun)
			last := &h.Runs[len(h.Runs)-1]
			checkSpot(t, "last run", last, &last.Rows[len(last.Rows)-1], tc.lastRun)
			tc.firstReading.IntervalStart = mustTime(t, readingStarts[tc.name][0])
			tc.lastReading.IntervalStart = mustTime(t, readingStarts[tc.name][1])
			tc.firstReading.Availability, tc.lastReading.Availability = 1, 1
			if got := h.Readings[0]; got != tc.firstReading {
				t.Errorf("first reading %+v, want %+v", got, tc.firstReading)
			}
			if got := h.Readings[len(h.Readings)-1]; got != tc.lastReading {
				t.Errorf("last reading %+v, want %+v", got, tc.lastReading)
			}
		})
	}
}

func checkSpot(t *testing.T, what string, run *model.WeatherRun, row *model.WeatherRow, want struct {
	site, issued, start string
	vars                []string
	values              []float64
}) {
	t.Helper()
	if run.Site != want.site || !run.IssuedAt.Equal(mustTime(t, want.issued)) || !row.ValidStart.Equal(mustTime(t, want.start)) {
		t.Errorf("%s: site %s issued %s row %s; want %s %s %s", what, run.Site, run.IssuedAt, row.ValidStart, want.site, want.issued, want.start)
	}
	for i, v := range want.vars {
		j := run.Var(v)
		if j < 0 {
			t.Errorf("%s: no variable %s in %v", what, v, run.Vars)
			continue
		}
		if row.Values[j] != want.values[i] {
			t.Errorf("%s: %s = %v, want %v", what, v, row.Values[j], want.values[i])
		}
	}
}

// checkSorted checks the order the package doc promises.
func checkSorted(t *testing.T, h *History) {
	t.Helper()
	if !slices.IsSortedFunc(h.Runs, compareRuns) {
		t.Error("runs not sorted by (IssuedAt, Site)")
	}
	if !slices.IsSortedFunc(h.Readings, compareReadings) {
		t.Error("readings not sorted by (End, Site)")
	}
	for i := range h.Runs {
		r := &h.Runs[i]
		if !slices.IsSorted(r.Vars) {
			t.Fatalf("run %d: vars %v not sorted", i, r.Vars)
		}
		for j := range r.Rows {
			if len(r.Rows[j].Values) != len(r.Vars) {
				t.Fatalf("run %d row %d: %d values for %d vars", i, j, len(r.Rows[j].Values), len(r.Vars))
			}
			if j > 0 && r.Rows[j].ValidStart.Before(r.Rows[j-1].End()) {
				t.Fatalf("run %d: rows %d and %d overlap", i, j-1, j)
			}
		}
	}
}

// fixture is a small history with the awkward cases: NaN values, two
// sources of runs, availability and curtailment, times out of order.
func fixture(t testing.TB) *History {
	t.Helper()
	lat, lon := 44.1, -30.2
	tm := func(s string) time.Time { return mustTime(t, s) }
	nan := math.NaN()
	return &History{
		Sites: []model.Site{
			{ID: "pv-a", Kind: model.KindPV, CapacityMW: 10, Lat: &lat, Lon: &lon, Note: "fixture"},
			{ID: "wind-b", Kind: model.KindWind, CapacityMW: 20.5},
		},
		Runs: []model.WeatherRun{
			{Site: "wind-b", IssuedAt: tm("2026-01-01T06:00:00Z"), Vars: []string{"temp_c", "wind_ms"}, Rows: []model.WeatherRow{
				{ValidStart: tm("2026-01-01T06:00:00Z"), ValidMinutes: 60, Values: []float64{3.25, 7.125}},
				{ValidStart: tm("2026-01-01T07:00:00Z"), ValidMinutes: 60, Values: []float64{nan, 1e-7}},
			}},
			{Site: "pv-a", IssuedAt: tm("2026-01-01T06:00:00Z"), Vars: []string{"ghi_wm2", "temp_c", "wind_ms"}, Rows: []model.WeatherRow{
				{ValidStart: tm("2026-01-01T06:00:00Z"), ValidMinutes: 30, Values: []float64{0, -1.5, nan}},
				{ValidStart: tm("2026-01-01T06:30:00Z"), ValidMinutes: 30, Values: []float64{12.345678901234567, -1.25, nan}},
			}},
			{Site: "pv-a", IssuedAt: tm("2026-01-01T00:00:00Z"), Vars: []string{"ghi_wm2", "temp_c", "wind_ms"}, Rows: []model.WeatherRow{
				{ValidStart: tm("2026-01-01T00:00:00Z"), ValidMinutes: 60, Values: []float64{0, 2, nan}},
			}},
		},
		Readings: []model.Reading{
			{Site: "wind-b", IntervalStart: tm("2026-01-01T05:45:00Z"), IntervalMinutes: 15, PowerMW: 20.5, Availability: 1},
			{Site: "pv-a", IntervalStart: tm("2026-01-01T05:45:00Z"), IntervalMinutes: 15, PowerMW: 0, Availability: 0.5},
			{Site: "pv-a", IntervalStart: tm("2026-01-01T06:00:00Z"), IntervalMinutes: 15, PowerMW: nan, Availability: 1, Curtailed: true},
			{Site: "wind-b", IntervalStart: tm("2026-01-01T05:00:00Z"), IntervalMinutes: 60, PowerMW: 3.3, Availability: 1},
		},
	}
}

// sameFloats compares bit patterns, so NaN equals NaN.
func sameFloats(a, b []float64) bool {
	return slices.EqualFunc(a, b, func(x, y float64) bool { return math.Float64bits(x) == math.Float64bits(y) })
}

func equalHistories(t *testing.T, got, want *History) {
	t.Helper()
	if len(got.Sites) != len(want.Sites) {
		t.Fatalf("%d sites, want %d", len(got.Sites), len(want.Sites))
	}
	for i := range want.Sites {
		g, w := got.Sites[i], want.Sites[i]
		if g.ID != w.ID || g.Kind != w.Kind || g.CapacityMW != w.CapacityMW || g.Note != w.Note || g.HasLocation() != w.HasLocation() ||
			(w.HasLocation() && (*g.Lat != *w.Lat || *g.Lon != *w.Lon)) {
			t.Errorf("site %d: got %+v, want %+v", i, g, w)
		}
	}
	if len(got.Runs) != len(want.Runs) {
		t.Fatalf("%d runs, want %d", len(got.Runs), len(want.Runs))
	}
	for i := range want.Runs {
		g, w := &got.Runs[i], &want.Runs[i]
		if g.Site != w.Site || !g.IssuedAt.Equal(w.IssuedAt) || g.Source != w.Source || !slices.Equal(g.Vars, w.Vars) || len(g.Rows) != len(w.Rows) {
			t.Fatalf("run %d: got %s %s %q %v (%d rows), want %s %s %q %v (%d rows)", i,
				g.Site, g.IssuedAt, g.Source, g.Vars, len(g.Rows), w.Site, w.IssuedAt, w.Source, w.Vars, len(w.Rows))
		}
		for j := range w.Rows {
			gr, wr := &g.Rows[j], &w.Rows[j]
			if !gr.ValidStart.Equal(wr.ValidStart) || gr.ValidMinutes != wr.ValidMinutes || !sameFloats(gr.Values, wr.Values) {
				t.Errorf("run %d row %d: got %+v, want %+v", i, j, *gr, *wr)
			}
		}
	}
	if len(got.Readings) != len(want.Readings) {
		t.Fatalf("%d readings, want %d", len(got.Readings), len(want.Readings))
	}
	for i := range want.Readings {
		g, w := got.Readings[i], want.Readings[i]
		if g.Site != w.Site || !g.IntervalStart.Equal(w.IntervalStart) || g.IntervalMinutes != w.IntervalMinutes ||
			!sameFloats([]float64{g.PowerMW}, []float64{w.PowerMW}) || g.Availability != w.Availability || g.Curtailed != w.Curtailed {
			t.Errorf("reading %d: got %+v, want %+v", i, g, w)
		}
	}
}

func TestWriteLoadRoundTrip(t *testing.T) {
	h := fixture(t)
	dir := t.TempDir()
	if err := Write(dir, h); err != nil {
		t.Fatal(err)
	}
	got, err := Load(dir, LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	// Load sorts, and gives every run the file's variables (the union).
	want := fixture(t)
	want.Sort()
	union := []string{"ghi_wm2", "temp_c", "wind_ms"}
	for i := range want.Runs {
		r := &want.Runs[i]
		for j := range r.Rows {
			vals := make([]float64, len(union))
			for k, v := range union {
				vals[k] = math.NaN()
				if c := r.Var(v); c >= 0 {
					vals[k] = r.Rows[j].Values[c]
				}
			}
			r.Rows[j].Values = vals
		}
		r.Vars = union
	}
	equalHistories(t, got, want)

	// Writing what was loaded gives the same bytes: the output depends on
	// content alone.
	dir2 := t.TempDir()
	if err := Write(dir2, got); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{SitesFile, "weather.csv.gz", "meter.csv.gz"} {
		a, _ := os.ReadFile(filepath.Join(dir, f))
		b, _ := os.ReadFile(filepath.Join(dir2, f))
		if !bytes.Equal(a, b) {
			t.Errorf("%s differs between the first and the second write", f)
		}
	}
}

// TestRoundTripSharedData writes two open data sets back and loads them
// again: the histories must be equal, NaN cells included.
func TestRoundTripSharedData(t *testing.T) {
	for _, name := range []string{"serf-pv-15min", "gefcom2014-solar"} {
		t.Run(name, func(t *testing.T) {
			h, err := Load(sharedtest.Data(t, name), LoadOptions{})
			if err != nil {
				t.Fatal(err)
			}
			dir := t.TempDir()
			if err := Write(dir, h); err != nil {
				t.Fatal(err)
			}
			back, err := Load(dir, LoadOptions{})
			if err != nil {
				t.Fatal(err)
			}
			equalHistories(t, back, h)
		})
	}
}

func TestWriteDeterministicBytes(t *testing.T) {
	h := fixture(t)
	dir := t.TempDir()
	if err := Write(dir, h); err != nil {
		t.Fatal(err)
	}
	raw, err := os.ReadFile(filepath.Join(dir, "meter.csv.gz"))
	if err != nil {
		t.Fatal(err)
	}
	zr, err := gzip.NewReader(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	if zr.Name != "" || !zr.ModTime.IsZero() {
		t.Errorf("gzip header name %q, mod time %v; want empty and zero", zr.Name, zr.ModTime)
	}
	text, err := io.ReadAll(zr)
	if err != nil {
		t.Fatal(err)
	}
	want := "site,interval_start,interval_minutes,power_mw,availability,curtailed\n" +
		"pv-a,2026-01-01T05:45:00Z,15,0,0.5,false\n" +
		"wind-b,2026-01-01T05:00:00Z,60,3.3,1,false\n" +
		"wind-b,2026-01-01T05:45:00Z,15,20.5,1,false\n" +
		"pv-a,2026-01-01T06:00:00Z,15,,1,true\n"
	if string(text) != want {
		t.Errorf("meter.csv.gz holds\n%s\nwant\n%s", text, want)
	}

	// Reversed input order gives the same bytes.
	slices.Reverse(h.Runs)
	slices.Reverse(h.Readings)
	dir2 := t.TempDir()
	if err := Write(dir2, h); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{SitesFile, "weather.csv.gz", "meter.csv.gz"} {
		a, _ := os.ReadFile(filepath.Join(dir, f))
		b, _ := os.ReadFile(filepath.Join(dir2, f))
		if !bytes.Equal(a, b) {
			t.Errorf("%s depends on the input order", f)
		}
	}
}

func TestWriteRejects(t *testing.T) {
	tests := []struct {
		name   string
		change func(h *History)
		want   string
	}{
		{"unknown run site", func(h *History) { h.Runs[0].Site = "nope" }, "site not in the registry"},
		{"unknown reading site", func(h *History) { h.Readings[0].Site = "nope" }, "site not in the registry"},
		{"source", func(h *History) { h.Runs[0].Source = "model-x" }, "no source column"},
		{"duplicate run", func(h *History) { h.Runs = append(h.Runs, h.Runs[0]) }, "appears twice"},
		{"duplicate reading", func(h *History) { h.Readings = append(h.Readings, h.Readings[0]) }, "appears twice"},
		{"values length", func(h *History) { h.Runs[0].Rows[0].Values = []float64{1} }, "1 values for 2 variables"},
		{"overlap", func(h *History) { h.Runs[0].Rows[1].ValidStart = h.Runs[0].Rows[0].ValidStart.Add(time.Minute) }, "overlap"},
		{"infinite value", func(h *History) { h.Runs[0].Rows[0].Values[0] = math.Inf(1) }, "infinite"},
		{"zero minutes", func(h *History) { h.Readings[0].IntervalMinutes = 0 }, "must be positive"},
		{"availability", func(h *History) { h.Readings[0].Availability = 1.5 }, "outside [0, 1]"},
		{"no sites", func(h *History) { h.Sites = nil }, "no site"},
		{"variable name", func(h *History) { h.Runs[0].Vars[0] = "a,b" }, "cannot name a weather variable"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			h := fixture(t)
			tc.change(h)
			err := Write(t.TempDir(), h)
			if err == nil {
				t.Fatal("no error")
			}
			if !errors.Is(err, ErrMalformed) || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error %q: want ErrMalformed and %q", err, tc.want)
			}
		})
	}
}

func TestLoadOptions(t *testing.T) {
	dir := t.TempDir()
	if err := Write(dir, fixture(t)); err != nil {
		t.Fatal(err)
	}
	tm := func(s string) time.Time { return mustTime(t, s) }
	tests := []struct {
		name           string
		opts           LoadOptions
		sites          []string
		runs, readings int
	}{
		{"all", LoadOptions{}, []string{"pv-a", "wind-b"}, 3, 4},
		{"one site", LoadOptions{Sites: []string{"wind-b"}}, []string{"wind-b"}, 1, 2},
		{"sites keep registry order", LoadOptions{Sites: []string{"wind-b", "pv-a"}}, []string{"pv-a", "wind-b"}, 3, 4},
		{"empty selection", LoadOptions{Sites: []string{}}, nil, 0, 0},
		// Runs at 00:00 and 06:00; reading ends at 06:00 (three) and 06:15.
		{"from is inclusive", LoadOptions{From: tm("2026-01-01T06:00:00Z")}, []string{"pv-a", "wind-b"}, 2, 4},
		{"to is exclusive", LoadOptions{To: tm("2026-01-01T06:00:00Z")}, []string{"pv-a", "wind-b"}, 1, 0},
		{"window", LoadOptions{From: tm("2026-01-01T06:00:00Z"), To: tm("2026-01-01T06:15:00Z")}, []string{"pv-a", "wind-b"}, 2, 3},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			h, err := Load(dir, tc.opts)
			if err != nil {
				t.Fatal(err)
			}
			var ids []string
			for _, s := range h.Sites {
				ids = append(ids, s.ID)
			}
			if !slices.Equal(ids, tc.sites) || len(h.Runs) != tc.runs || len(h.Readings) != tc.readings {
				t.Errorf("got sites %v, %d runs, %d readings; want %v, %d, %d", ids, len(h.Runs), len(h.Readings), tc.sites, tc.runs, tc.readings)
			}
		})
	}
	if _, err := Load(dir, LoadOptions{Sites: []string{"nope"}}); !errors.Is(err, ErrUnknownSite) {
		t.Errorf("unknown site in options: error %v, want ErrUnknownSite", err)
	}
}

// writeFolder writes a plain-text history folder for the error tests.
func writeFolder(t *testing.T, files map[string]string) string {
	t.Helper()
	dir := t.TempDir()
	for name, text := range files {
		if err := os.WriteFile(filepath.Join(dir, name), []byte(text), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	return dir
}

func TestLoadErrors(t *testing.T) {
	const (
		sites   = `[{"id": "s1", "kind": "pv", "capacity_mw": 5}, {"id": "s2", "kind": "wind", "capacity_mw": 7}]`
		weather = "site,issued_at,valid_start,valid_minutes,temp_c,ghi_wm2\n" +
			"s1,2026-03-02T00:00:00Z,2026-03-02T00:00:00Z,60,4.5,0\n" +
			"s1,2026-03-02T00:00:00Z,2026-03-02T01:00:00Z,60,4.25,\n"
		meter = "site,interval_start,interval_minutes,power_mw\n" +
			"s1,2026-03-02T00:00:00Z,15,0\n" +
			"s2,2026-03-02T00:00:00Z,15,3.5\n"
	)
	tests := []struct {
		name     string
		files    map[string]string
		want     []string // substrings of the error
		notExist bool
	}{
		{
			name:  "bad time",
			files: map[string]string{"weather.csv": strings.Replace(weather, "2026-03-02T01:00:00Z", "2026-03-02 01:00", 1)},
			want:  []string{"weather.csv:3: column valid_start: parsing time \"2026-03-02 01:00\""},
		},
		{
			name:  "day out of range",
			files: map[string]string{"meter.csv": strings.Replace(meter, "2026-03-02T00:00:00Z,15,3.5", "2026-02-30T00:00:00Z,15,3.5", 1)},
			want:  []string{"meter.csv:3: column interval_start: parsing time", "day out of range"},
		},
		{
			name:  "unknown site",
			files: map[string]string{"meter.csv": strings.Replace(meter, "s2,", "s9,", 1)},
			want:  []string{"meter.csv:3: column site: unknown site \"s9\""},
		},
		{
			name:  "missing column",
			files: map[string]string{"weather.csv": strings.Replace(weather, "valid_minutes,", "minutes,", 1)},
			want:  []string{"weather.csv:1: missing required column \"valid_minutes\""},
		},
		{
			name:  "missing power column",
			files: map[string]string{"meter.csv": strings.Replace(meter, "power_mw", "power_kw", 1)},
			want:  []string{"meter.csv:1: missing required column \"power_mw\""},
		},
		{
			name:  "unknown meter column",
			files: map[string]string{"meter.csv": strings.Replace(meter, "power_mw", "power_mw,energy_mwh", 1)},
			want:  []string{"meter.csv:1: unknown column \"energy_mwh\""},
		},
		{
			name:  "non-numeric cell",
			files: map[string]string{"weather.csv": strings.Replace(weather, "4.25", "warm", 1)},
			want:  []string{"weather.csv:3: column temp_c: strconv.ParseFloat: parsing \"warm\": invalid syntax"},
		},
		{
			name:  "infinite cell",
			files: map[string]string{"meter.csv": strings.Replace(meter, "3.5", "+Inf", 1)},
			want:  []string{"meter.csv:3: column power_mw: value \"+Inf\" is not finite"},
		},
		{
			name:  "bad minutes",
			files: map[string]string{"meter.csv": strings.Replace(meter, ",15,0", ",0,0", 1)},
			want:  []string{"meter.csv:2: column interval_minutes: 0 minutes: must be positive"},
		},
		{
			name:  "wrong number of fields",
			files: map[string]string{"meter.csv": meter + "s1,2026-03-02T00:15:00Z,15\n"},
			want:  []string{"meter.csv:4: wrong number of fields"},
		},
		{
			name:  "repeated weather row",
			files: map[string]string{"weather.csv": weather + "s1,2026-03-02T00:00:00Z,2026-03-02T01:00:00Z,60,4,1\n"},
			want:  []string{"weather.csv:4: column valid_start: run of site s1 issued 2026-03-02T00:00:00Z: row repeats the valid interval of line 3"},
		},
		{
			name:  "overlapping weather rows",
			files: map[string]string{"weather.csv": weather + "s1,2026-03-02T00:00:00Z,2026-03-02T00:30:00Z,60,4,1\n"},
			want:  []string{"weather.csv:4: column valid_start:", "overlaps the valid interval of line"},
		},
		{
			name:  "duplicate reading",
			files: map[string]string{"meter.csv": meter + "s1,2026-03-02T00:00:00Z,15,1\n"},
			want:  []string{"meter.csv:4: column interval_start: site s1: second reading of the interval at 2026-03-02T00:00:00Z (first on line 2)"},
		},
		{
			name:  "bad availability",
			files: map[string]string{"meter.csv": "site,interval_start,interval_minutes,power_mw,availability\ns1,2026-03-02T00:00:00Z,15,0,2\n"},
			want:  []string{"meter.csv:2: column availability: 2 is outside [0, 1]"},
		},
		{
			name:  "bad curtailed",
			files: map[string]string{"meter.csv": "site,interval_start,interval_minutes,power_mw,curtailed\ns1,2026-03-02T00:00:00Z,15,0,maybe\n"},
			want:  []string{"meter.csv:2: column curtailed: strconv.ParseBool: parsing \"maybe\""},
		},
		{
			name:  "duplicate column",
			files: map[string]string{"weather.csv": strings.Replace(weather, "ghi_wm2", "temp_c", 1)},
			want:  []string{"weather.csv:1: column \"temp_c\" appears twice"},
		},
		{
			name:  "bad sites",
			files: map[string]string{"sites.json": `[{"id": "s1", "kind": "hydro", "capacity_mw": 5}]`},
			want:  []string{"sites.json: ", "kind \"hydro\""},
		},
		{
			name:  "both plain and gzip",
			files: map[string]string{"meter.csv.gz": "x"},
			want:  []string{"both meter.csv and meter.csv.gz exist"},
		},
		{
			name:  "empty file",
			files: map[string]string{"meter.csv": ""},
			want:  []string{"meter.csv:1: empty file"},
		},
		{
			name:     "missing sites.json",
			files:    map[string]string{"sites.json": "-"},
			want:     []string{"sites.json: no such file"},
			notExist: true,
		},
		{
			name:     "missing file",
			files:    map[string]string{"meter.csv": "-"},
			want:     []string{"meter.csv or meter.csv.gz"},
			notExist: true,
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			files := map[string]string{"sites.json": sites, "weather.csv": weather, "meter.csv": meter}
			for k, v := range tc.files {
				files[k] = v
			}
			if tc.notExist {
				for k, v := range tc.files {
					if v == "-" {
						delete(files, k)
					}
				}
			}
			_, err := Load(writeFolder(t, files), LoadOptions{})
			if err == nil {
				t.Fatal("no error")
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not contain %q", err, w)
				}
			}
			if tc.notExist {
				if !errors.Is(err, fs.ErrNotExist) {
					t.Errorf("error %q does not match fs.ErrNotExist", err)
				}
			} else if !errors.Is(err, ErrMalformed) {
				t.Errorf("error %q does not match ErrMalformed", err)
			}
		})
	}
	// The fixture itself loads, so each case above fails for its own reason.
	if _, err := Load(writeFolder(t, map[string]string{"sites.json": sites, "weather.csv": weather, "meter.csv": meter}), LoadOptions{}); err != nil {
		t.Fatalf("good fixture: %v", err)
	}
}

func TestLoadGzipError(t *testing.T) {
	dir := writeFolder(t, map[string]string{
		"sites.json":     `[{"id": "s1", "kind": "pv", "capacity_mw": 5}]`,
		"weather.csv.gz": "this is not a gzip stream",
		"meter.csv":      "site,interval_start,interval_minutes,power_mw\n",
	})
	_, err := Load(dir, LoadOptions{})
	if err == nil || !errors.Is(err, ErrMalformed) || !strings.Contains(err.Error(), "weather.csv.gz: gzip: invalid header") {
		t.Errorf("error %v: want a gzip header error naming weather.csv.gz", err)
	}
}

func TestEventsOrder(t *testing.T) {
	h := fixture(t)
	ev := h.Events()
	type key struct {
		time, kind, site string
		minutes          int
	}
	var got []key
	for _, e := range ev {
		k := key{time: e.Time.Format("15:04"), site: e.Site()}
		if e.Run != nil {
			k.kind = "run"
		} else {
			k.kind, k.minutes = "reading", e.Reading.IntervalMinutes
		}
		got = append(got, k)
	}
	// Package doc: time, readings before runs, site, longer interval first.
	want := []key{
		{"00:00", "run", "pv-a", 0},
		{"06:00", "reading", "pv-a", 15},
		{"06:00", "reading", "wind-b", 60},
		{"06:00", "reading", "wind-b", 15},
		{"06:00", "run", "pv-a", 0},
		{"06:00", "run", "wind-b", 0},
		{"06:15", "reading", "pv-a", 15},
	}
	if !slices.Equal(got, want) {
		t.Errorf("events\n%v\nwant\n%v", got, want)
	}
	for _, e := range ev {
		if (e.Run == nil) == (e.Reading == nil) {
			t.Fatalf("event %+v: want exactly one of Run and Reading", e)
		}
	}
	// Shuffling the input does not change the order.
	slices.Reverse(h.Runs)
	slices.Reverse(h.Readings)
	var again []key
	for _, e := range h.Events() {
		k := key{time: e.Time.Format("15:04"), site: e.Site()}
		if e.Run != nil {
			k.kind = "run"
		} else {
			k.kind, k.minutes = "reading", e.Reading.IntervalMinutes
		}
		again = append(again, k)
	}
	if !slices.Equal(again, want) {
		t.Errorf("events depend on input order:\n%v", again)
	}
}

func TestParseTime(t *testing.T) {
	tests := []struct {
		name string
		in   string
		want string // RFC 3339 in UTC; empty for an error
	}{
		{"fast path", "2026-03-02T13:45:07Z", "2026-03-02T13:45:07Z"},
		{"leap day", "2024-02-29T00:00:00Z", "2024-02-29T00:00:00Z"},
		{"not a leap day", "2026-02-29T00:00:00Z", ""},
		{"day 31", "2026-01-31T23:59:59Z", "2026-01-31T23:59:59Z"},
		{"day 31 of April", "2026-04-31T00:00:00Z", ""},
		{"hour 24", "2026-03-02T24:00:00Z", ""},
		{"month 13", "2026-13-02T00:00:00Z", ""},
		{"offset", "2026-03-02T01:00:00+02:00", "2026-03-01T23:00:00Z"},
		{"fraction", "2026-03-02T01:00:00.5Z", "2026-03-02T01:00:00.5Z"},
		{"garbage", "yesterday", ""},
		{"sign in digits", "2026-0+-02T00:00:00Z", ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := parseTime(tc.in)
			if tc.want == "" {
				if err == nil {
					t.Errorf("parseTime(%q) = %v, want an error", tc.in, got)
				}
				return
			}
			if err != nil {
				t.Fatalf("parseTime(%q): %v", tc.in, err)
			}
			if got.Location() != time.UTC || got.Format(time.RFC3339Nano) != tc.want {
				t.Errorf("parseTime(%q) = %v, want %s in UTC", tc.in, got, tc.want)
			}
		})
	}
}

// FuzzParseTime holds the fast path to time.Parse.
func FuzzParseTime(f *testing.F) {
	for _, s := range []string{"2026-03-02T13:45:07Z", "2024-02-29T00:00:00Z", "2026-02-30T00:00:00Z", "0000-01-01T00:00:00Z", "2026-03-02T01:00:00+02:00"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		got, err := parseTime(s)
		want, werr := time.Parse(time.RFC3339, s)
		if (err == nil) != (werr == nil) {
			t.Fatalf("parseTime(%q) error %v, time.Parse error %v", s, err, werr)
		}
		if err == nil && !got.Equal(want) {
			t.Fatalf("parseTime(%q) = %v, time.Parse gives %v", s, got, want)
		}
	})
}

// FuzzLoadMeter feeds arbitrary meter files to Load: it must return a
// history or an error, never panic, and what it returns must be sorted.
func FuzzLoadMeter(f *testing.F) {
	f.Add("site,interval_start,interval_minutes,power_mw\ns1,2026-03-02T00:00:00Z,15,0\n")
	f.Add("site,interval_start,interval_minutes,power_mw,availability,curtailed\ns1,2026-03-02T00:00:00Z,15,,0.5,1\n")
	f.Add("power_mw,site,interval_minutes,interval_start\n1,s1,60,2026-03-02T00:00:00Z\n")
	f.Fuzz(func(t *testing.T, meter string) {
		dir := t.TempDir()
		files := map[string]string{
			"sites.json":  `[{"id": "s1", "kind": "pv", "capacity_mw": 5}]`,
			"weather.csv": "site,issued_at,valid_start,valid_minutes\n",
			"meter.csv":   meter,
		}
		for name, text := range files {
			if err := os.WriteFile(filepath.Join(dir, name), []byte(text), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		h, err := Load(dir, LoadOptions{})
		if err != nil {
			if !errors.Is(err, ErrMalformed) {
				t.Fatalf("error %v does not match ErrMalformed", err)
			}
			return
		}
		if !slices.IsSortedFunc(h.Readings, compareReadings) {
			t.Fatal("readings not sorted")
		}
	})
}

func BenchmarkLoadGefcomWind(b *testing.B) {
	dir := sharedtest.Data(b, "gefcom2012-wind")
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Load(dir, LoadOptions{}); err != nil {
			b.Fatal(err)
		}
	}
}
