package worker

import (
	"bytes"
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/solar"
	"github.com/plumb-forecast/plumb/stream"
)

var t0 = time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC)

func ptr(v float64) *float64 { return &v }

// testSites are invented sites for tests.
func testSites() []model.Site {
	return []model.Site{
		{ID: "pv-test", Kind: model.KindPV, CapacityMW: 10, Lat: ptr(44), Lon: ptr(-30)},
		{ID: "wind-test", Kind: model.KindWind, CapacityMW: 20},
	}
}

// feed is a small synthetic input sequence: 6-hourly weather runs (hourly
// rows, 48 h ahead) and 15-minute readings whose output follows the
// forecast driver with noise. It is invented test data, seeded.
type feed struct {
	runs     []model.WeatherRun
	readings []model.Reading
}

func makeFeed(site model.Site, days int, seed uint64) feed {
	rng := rand.New(rand.NewPCG(seed, 7))
	var f feed
	truth := func(t time.Time) float64 { // per-unit driver truth
		h := float64(t.Hour()) + float64(t.Minute())/60
		switch site.Kind {
		case model.KindPV:
			z, _ := solar.Position(t, *site.Lat, *site.Lon)
			e := 90 - z
			return math.Max(0, math.Sin(e*math.Pi/180)) * (0.6 + 0.4*math.Sin(float64(t.YearDay())+h/7))
		default:
			return 0.5 + 0.4*math.Sin(float64(t.Unix())/40000)
		}
	}
	for d := 0; d < days*4; d++ {
		iss := t0.Add(time.Duration(d) * 6 * time.Hour)
		run := model.WeatherRun{Site: site.ID, IssuedAt: iss}
		if site.Kind == model.KindPV {
			run.Vars = []string{"ghi_wm2", "temp_c"}
		} else {
			run.Vars = []string{"temp_c", "wind_ms"}
		}
		for h := 0; h < 48; h++ {
			vs := iss.Add(time.Duration(h) * time.Hour)
			v := truth(vs.Add(30*time.Minute)) * (1 + 0.05*rng.NormFloat64())
			row := model.WeatherRow{ValidStart: vs, ValidMinutes: 60}
			if site.Kind == model.KindPV {
				row.Values = []float64{math.Max(0, 1000*v), 12}
			} else {
				row.Values = []float64{8, math.Max(0, 15*v)}
			}
			run.Rows = append(run.Rows, row)
		}
		f.runs = append(f.runs, run)
	}
	for i := 0; i < days*96; i++ {
		s := t0.Add(time.Duration(i) * 15 * time.Minute)
		p := site.CapacityMW * truth(s.Add(7*time.Minute)) * (1 + 0.1*rng.NormFloat64())
		f.readings = append(f.readings, model.Reading{
			Site: site.ID, IntervalStart: s, IntervalMinutes: 15,
			PowerMW: math.Max(0, math.Min(site.CapacityMW, p)), Availability: 1,
		})
	}
	return f
}

// play applies a feed to an actor in event-time order and returns the
// encoded bundles.
func play(t *testing.T, a *Actor, f feed) [][]byte {
	t.Helper()
	enc := stream.NewBundleEncoder()
	var out [][]byte
	ri := 0
	for _, r := range f.readings {
		for ri < len(f.runs) && !f.runs[ri].IssuedAt.After(r.End()) {
			if err := a.Weather(&f.runs[ri]); err != nil {
				t.Fatalf("weather run %s: %v", f.runs[ri].IssuedAt, err)
			}
			ri++
		}
		if err := a.Meter(&r); err != nil {
			t.Fatalf("reading %s: %v", r.IntervalStart, err)
		}
		b := a.Refresh()
		var buf bytes.Buffer
		if err := enc.Encode(&buf, b); err != nil {
			t.Fatal(err)
		}
		out = append(out, buf.Bytes())
	}
	return out
}

// sunBelow reports whether the sun is more than deg degrees below the horizon.
func sunBelow(t time.Time, lat, lon, deg float64) bool {
	z, _ := solar.Position(t, lat, lon)
	return z > 90+deg
}

func newTestActor(t *testing.T, s model.Site) *Actor {
	t.Helper()
	a, err := NewActor(s, Config{}.WithDefaults())
	if err != nil {
		t.Fatal(err)
	}
	return a
}

// TestActorDeterministic: the same inputs in the same order give the same
// bundles, byte for byte (DESIGN.md, "One code path, event time").
func TestActorDeterministic(t *testing.T) {
	for _, s := range testSites() {
		f := makeFeed(s, 5, 1)
		b1 := play(t, newTestActor(t, s), f)
		b2 := play(t, newTestActor(t, s), f)
		if len(b1) != len(b2) || len(b1) == 0 {
			t.Fatalf("%s: %d and %d bundles", s.ID, len(b1), len(b2))
		}
		for i := range b1 {
			if !bytes.Equal(b1[i], b2[i]) {
				t.Fatalf("%s: bundle %d differs between two runs", s.ID, i)
			}
		}
	}
}

// TestActorBundleInvariants checks each bundle: monotone quantiles within
// [0, available capacity], zero at night for PV, steps from now to at least
// 36 h with consistent leads.
func TestActorBundleInvariants(t *testing.T) {
	for _, s := range testSites() {
		a := newTestActor(t, s)
		f := makeFeed(s, 4, 2)
		ri := 0
		nights := 0
		for k, r := range f.readings {
			for ri < len(f.runs) && !f.runs[ri].IssuedAt.After(r.End()) {
				if err := a.Weather(&f.runs[ri]); err != nil {
					t.Fatal(err)
				}
				ri++
			}
			if err := a.Meter(&r); err != nil {
				t.Fatal(err)
			}
			b := a.Refresh()
			if !b.IssuedAt.Equal(r.End()) {
				t.Fatalf("issued %s, want the reading's end %s", b.IssuedAt, r.End())
			}
			if !b.Steps[0].ValidStart.Equal(b.IssuedAt) || b.Steps[0].LeadMinutes != 0 {
				t.Fatalf("first step %+v, want lead 0 at %s", b.Steps[0], b.IssuedAt)
			}
			last := b.Steps[len(b.Steps)-1]
			if end := last.ValidStart.Add(15 * time.Minute); end.Sub(b.IssuedAt) < 36*time.Hour {
				t.Fatalf("bundle reaches %s, less than 36 h after %s", end, b.IssuedAt)
			}
			for i, st := range b.Steps {
				if want := int(st.ValidStart.Sub(b.IssuedAt) / time.Minute); st.LeadMinutes != want {
					t.Fatalf("step %d lead %d, want %d", i, st.LeadMinutes, want)
				}
				row := b.Row(i)
				for j, v := range row {
					if v < 0 || v > s.CapacityMW || math.IsNaN(v) {
						t.Fatalf("bundle %d step %d level %v: %v outside [0, %v]", k, i, b.Levels[j], v, s.CapacityMW)
					}
					if j > 0 && v < row[j-1] {
						t.Fatalf("bundle %d step %d: quantiles cross: %v", k, i, row)
					}
				}
				if s.Kind == model.KindPV && sunBelow(st.ValidStart.Add(7*time.Minute), *s.Lat, *s.Lon, 5) {
					nights++
					if row[len(row)-1] != 0 {
						t.Fatalf("PV at night (%s): %v, want zeros", st.ValidStart, row)
					}
				}
			}
		}
		if s.Kind == model.KindPV && nights == 0 {
			t.Fatal("no night step checked")
		}
	}
}

// TestActorCoverage: on stationary invented data the calibrated coverage of
// every level ends close to its target (loose bound: a few days of data).
func TestActorCoverage(t *testing.T) {
	s := testSites()[1]
	a := newTestActor(t, s)
	play(t, a, makeFeed(s, 20, 3))
	for _, ls := range a.Stats() {
		if ls.Settled < 1000 {
			t.Fatalf("level %v: only %d settled", ls.Level, ls.Settled)
		}
		if math.Abs(ls.Coverage-ls.Level) > 0.08 {
			t.Errorf("level %v: coverage %.3f", ls.Level, ls.Coverage)
		}
	}
}

func TestActorRefusals(t *testing.T) {
	s := testSites()[1]
	a := newTestActor(t, s)
	f := makeFeed(s, 2, 4)
	if err := a.Weather(&f.runs[0]); err != nil {
		t.Fatal(err)
	}
	if err := a.Weather(&f.runs[0]); !errors.Is(err, ErrDuplicate) {
		t.Fatalf("same run twice: %v, want ErrDuplicate", err)
	}
	for i := 0; i < 40; i++ {
		if err := a.Meter(&f.readings[i]); err != nil {
			t.Fatal(err)
		}
	}
	if err := a.Meter(&f.readings[39]); !errors.Is(err, ErrDuplicate) {
		t.Fatalf("same reading twice: %v, want ErrDuplicate", err)
	}
	if err := a.Meter(&f.readings[0]); !errors.Is(err, ErrTooLate) {
		t.Fatalf("reading 10 h old: %v, want ErrTooLate", err)
	}
	far := f.readings[40]
	far.IntervalStart = far.IntervalStart.Add(400 * 24 * time.Hour)
	if err := a.Meter(&far); !errors.Is(err, ErrTooFarAhead) {
		t.Fatalf("reading 400 days ahead: %v, want ErrTooFarAhead", err)
	}
	// A late reading inside the lateness window is applied.
	if err := a.Meter(&f.readings[41]); err != nil {
		t.Fatal(err)
	}
	if err := a.Meter(&f.readings[40]); err != nil {
		t.Fatalf("reading 15 minutes late: %v", err)
	}
}

// TestSortPairs: levels sorted stably, each offset and index moved with
// its level.
func TestSortPairs(t *testing.T) {
	levels := []float64{0.1, 0.3, 0.2, 0.2, 0.05, 0.9}
	offsets := []float64{1, 3, 2, 22, 0.5, 9}
	idx := []int32{0, 1, 2, 3, 4, 5}
	sortPairs(levels, offsets, idx)
	wantL := []float64{0.05, 0.1, 0.2, 0.2, 0.3, 0.9}
	wantO := []float64{0.5, 1, 2, 22, 3, 9}
	wantI := []int32{4, 0, 2, 3, 1, 5}
	if !slices.Equal(levels, wantL) || !slices.Equal(offsets, wantO) || !slices.Equal(idx, wantI) {
		t.Errorf("got %v %v %v, want %v %v %v", levels, offsets, idx, wantL, wantO, wantI)
	}
}

// TestDarkWithoutLocation: a PV site without a location counts a step as
// night only if no reading in the last 14 days showed any output in any of
// its quarter-hours: a dawn quarter-hour that once gave a trickle (far below
// 0.5 % of capacity) is not night, so the forecaster is asked and the
// calibrators learn from it (GEFCom2014 solar: such dawn hours, taken for
// night from the run, were 4 % of the scored forecasts, each a miss at
// every level).
func TestDarkWithoutLocation(t *testing.T) {
	s := model.Site{ID: "pv-noloc", Kind: model.KindPV, CapacityMW: 10}
	a := newTestActor(t, s)
	trickle := t0.Add(3*24*time.Hour + 6*time.Hour) // day 3, 06:00-06:15
	for i := 0; i < 16*96; i++ {
		st := t0.Add(time.Duration(i) * 15 * time.Minute)
		p := 0.0
		if h := st.Hour(); h >= 9 && h < 17 {
			p = 5
		}
		if st.Equal(trickle) {
			p = 1e-4
		}
		r := model.Reading{Site: s.ID, IntervalStart: st, IntervalMinutes: 15, PowerMW: p, Availability: 1}
		if err := a.Meter(&r); err != nil {
			t.Fatal(err)
		}
	}
	day := t0.Add(16 * 24 * time.Hour)
	for _, c := range []struct {
		at      time.Duration
		minutes int
		dark    bool
	}{
		{2 * time.Hour, 15, true},
		{6 * time.Hour, 15, false}, // the trickle
		{6*time.Hour + 15*time.Minute, 15, true},
		{5 * time.Hour, 60, true},
		{5*time.Hour + 30*time.Minute, 60, false}, // spans 06:00
		{12 * time.Hour, 15, false},
	} {
		if got := a.dark(day.Add(c.at), c.minutes); got != c.dark {
			t.Errorf("dark(%s, %d min) = %v, want %v", c.at, c.minutes, got, c.dark)
		}
	}
	// Fewer than 14 days observed: nothing is dark yet.
	b := newTestActor(t, s)
	r := model.Reading{Site: s.ID, IntervalStart: t0, IntervalMinutes: 15, Availability: 1}
	if err := b.Meter(&r); err != nil {
		t.Fatal(err)
	}
	if b.dark(t0.Add(2*time.Hour), 15) {
		t.Error("dark after one reading")
	}
}

// TestOwnQuantiles: each calibrator's own value is the pre-sort row's value
// at its rank, clipped to [0, available capacity].
func TestOwnQuantiles(t *testing.T) {
	a := newTestActor(t, testSites()[1])
	x := &model.Features{CapacityMW: 20, Availability: 0.5}
	pre := []float64{-1, 3, 4, 12} // asked in level order
	rank := []int32{2, 0, 3, 1}    // calibrator 0's level is the third smallest
	own := make([]float64, 4)
	a.ownQuantiles(own, pre, rank, x)
	if want := []float64{4, 0, 10, 3}; !slices.Equal(own, want) {
		t.Errorf("own %v, want %v", own, want)
	}
}

// TestPITOf: the raw PIT interpolated between levels, 0 and 1 beyond the
// grid, and drawn across an atom (quantiles equal to the outcome) as
// conformal.TieHit judges a tie.
func TestPITOf(t *testing.T) {
	levels := []float64{0.1, 0.5, 0.9}
	for _, c := range []struct {
		q       []float64
		y, u    float64
		want    float64
		comment string
	}{
		{[]float64{1, 2, 4}, 3, 0.7, 0.7, "between 0.5 and 0.9"},
		{[]float64{1, 2, 4}, 0.5, 0.7, 0, "below the grid"},
		{[]float64{1, 2, 4}, 5, 0.7, 1, "above the grid"},
		{[]float64{1, 2, 4}, 2, 0.7, 0.5, "on one quantile, no atom"},
		{[]float64{0, 0, 4}, 0, 0.25, 0.125, "an atom at zero: drawn in [0, 0.5]"},
		{[]float64{0, 2, 4}, 0, 0.5, 0.05, "one zero quantile, the lowest: drawn in [0, 0.1]"},
		{[]float64{0, 4, 4}, 4, 0.5, 0.55, "an atom at capacity: drawn in [0.1, 1]"},
	} {
		if got := pitOf(levels, c.q, c.y, c.u); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("%s: pitOf(%v, %v, u %v) = %v, want %v", c.comment, c.q, c.y, c.u, got, c.want)
		}
	}
}

// TestCoverageReadout: the coverage monitor's readout of a site agrees
// with its parts (Kupiec p-value recomputed from the window's misses, the
// correction equal to the calibrator's Adjust), tells a calibrator's trend
// (zero at its first settlement), and survives a snapshot exactly.
func TestCoverageReadout(t *testing.T) {
	site := testSites()[1]
	cfg := Config{}.WithDefaults()
	a, err := NewActor(site, cfg)
	if err != nil {
		t.Fatal(err)
	}
	for _, x := range inputs(variedFeed(site, 4, 31)) {
		apply(t, a, x)
	}
	cells := a.Coverage()
	nl := len(cfg.Levels)
	if len(cells) != cfg.Buckets.Len()*nl {
		t.Fatalf("%d cells", len(cells))
	}
	moving := 0
	for i, c := range cells {
		m := a.cells[i].mon
		if c.Level != cfg.Levels[i%nl] || c.LeadBucket != cfg.Buckets.Name(i/nl) || c.Window != m.Calibrated.Count() {
			t.Fatalf("cell %d: %+v", i, c)
		}
		if c.Window > 0 {
			if _, p := conformal.Kupiec(m.Calibrated.Misses(), c.Window, 1-c.Level); p != c.KupiecP {
				t.Errorf("cell %d: Kupiec p %v, want %v", i, c.KupiecP, p)
			}
		}
		if l, o := a.cells[i].cal.Adjust(); l != c.CalibratedLevel || o != c.Offset {
			t.Errorf("cell %d: correction (%v, %v), Adjust (%v, %v)", i, c.CalibratedLevel, c.Offset, l, o)
		}
		if c.LevelTrend != 0 {
			moving++
		}
	}
	if moving == 0 {
		t.Error("no calibrator's level moved over four days: the trend is not kept")
	}
	b, _, err := RestoreActor(site, cfg, snapshot(t, a, 1))
	if err != nil {
		t.Fatal(err)
	}
	if got := b.Coverage(); !reflect.DeepEqual(got, cells) {
		t.Error("the readout changed across a snapshot")
	}
}

// TestRefreshIntoShared: sites that refresh one after the other into one
// shared bundle (as a pool shard does) publish the same bytes as sites
// that each keep their own bundle.
func TestRefreshIntoShared(t *testing.T) {
	sites := testSites()
	cfg := Config{}.WithDefaults()
	var own, shared [2]*Actor
	var ins [2][]input
	for k := range 2 {
		own[k], _ = NewActor(sites[k], cfg)
		shared[k], _ = NewActor(sites[k], cfg)
		ins[k] = inputs(variedFeed(sites[k], 3, uint64(40+k)))
	}
	enc := stream.NewBundleEncoder()
	var dst model.Bundle
	var a, b bytes.Buffer
	steps := 0
	for i := 0; i < max(len(ins[0]), len(ins[1])); i++ {
		for k := range 2 {
			if i >= len(ins[k]) {
				continue
			}
			for _, act := range []*Actor{own[k], shared[k]} {
				if x := ins[k][i]; x.run != nil {
					_ = act.Weather(x.run)
				} else {
					_ = act.Meter(x.reading)
				}
			}
			bo, bs := own[k].Refresh(), shared[k].RefreshInto(&dst)
			if (bo == nil) != (bs == nil) {
				t.Fatalf("site %d input %d: bundles %v and %v", k, i, bo != nil, bs != nil)
			}
			if bo == nil {
				continue
			}
			a.Reset()
			b.Reset()
			if err := enc.Encode(&a, bo); err != nil {
				t.Fatal(err)
			}
			if err := enc.Encode(&b, bs); err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(a.Bytes(), b.Bytes()) {
				t.Fatalf("site %d input %d: the shared bundle encodes differently", k, i)
			}
			steps++
		}
	}
	if steps < 100 {
		t.Fatalf("only %d bundles compared", steps)
	}
}

// TestIssueWeight: a settled forecast's weight is the forecasts issued
// for its interval over its bucket's mean of them, truncated to [2/3, 3/2];
// the first settlement of a bucket (or the first after a restore of a
// version 5 snapshot) starts the mean and weighs 1; the mean is a running
// one over the first issuedWindow settlements.
func TestIssueWeight(t *testing.T) {
	a, err := NewActor(testSites()[1], snapConfig(t, "baseline", conformal.MethodACI))
	if err != nil {
		t.Fatal(err)
	}
	nl := len(a.cfg.Levels)
	settle := func(b int, issued int32) float64 {
		w := a.issueWeight(b, issued)
		a.cells[b*nl].settled++
		return w
	}
	for _, c := range []struct {
		issued     int32
		want, mean float64
	}{
		{12, 1, 12},               // first: starts the mean
		{6, 2.0 / 3, 9},           // 6 / 12 = 1/2, truncated; then (12 + 6) / 2
		{9, 1, 9},                 // 9 / 9
		{27, 1.5, 13.5},           // 27 / 9 = 3, truncated; (12 + 6 + 9 + 27) / 4
		{2, 2.0 / 3, 11.2},        // 2 / 13.5, truncated
		{14, 14 / 11.2, 70.0 / 6}, // 1.25, within bounds
	} {
		if w := settle(3, c.issued); math.Abs(w-c.want) > 1e-12 || math.Abs(a.issuedMean[3]-c.mean) > 1e-12 {
			t.Fatalf("issued %d: weight %v, mean %v; want %v, %v", c.issued, w, a.issuedMean[3], c.want, c.mean)
		}
	}
	if a.issuedMean[2] != 0 {
		t.Errorf("another bucket's mean moved: %v", a.issuedMean[2])
	}
	a.cells[3*nl].settled = 5 * issuedWindow
	m := a.issuedMean[3]
	settle(3, 1)
	if want := m + (1-m)/issuedWindow; math.Abs(a.issuedMean[3]-want) > 1e-12 {
		t.Errorf("past the window the mean moved to %v, want %v (exponential)", a.issuedMean[3], want)
	}
}
