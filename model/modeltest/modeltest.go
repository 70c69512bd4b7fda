// Package modeltest is the conformance suite every model.Forecaster must
// pass, in the manner of testing/slogtest for slog handlers:
//
//	func TestConformance(t *testing.T) {
//		modeltest.Run(t, func(s model.Site) model.Forecaster {
//			return model.NewBaseline(s.Kind, model.BaselineOptions{})
//		})
//	}
//
// # What it feeds
//
// Two invented sites, a 20 MW PV plant with a location (a point in the open
// North Atlantic) and a 50 MW wind farm without one, each with a seeded
// synthetic history of 15-minute intervals: a driver series (global
// horizontal irradiance for PV: the Haurwitz clear sky of the sun's true
// position times an AR(1) clear-sky index; wind speed: an AR(1) Gaussian index
// mapped to a Weibull distribution), and outcomes that are a monotone function
// of the driver plus Gaussian noise (not clipped: a meter may read a little
// below zero). The process is stationary apart from the sun's path, and the
// weeks fed are centred on the June solstice so that the path hardly moves.
//
// The suite plays the site actor's part (package worker). Forecasts are
// issued at the start of each interval for targets 0 to 40 h ahead, one per
// lead bucket of model.DefaultBuckets (a lead drawn at random within the
// bucket, in whole intervals), with the features the actor would build:
// the driver as a weather run would give it (the truth plus an error growing
// with lead; as Driver and as the one variable of a weather row), the latest reading at issue, the sun's state, the hour of day.
// When an interval's outcome is known, Learn is called once with the features
// of every forecast issued for it, shortest lead first, unless the sun was
// down over the interval (PV), as the actor does; the features are then
// overwritten, so a forecaster that keeps them past the call is caught.
// Forecasters under test must therefore use model.DefaultBuckets.
//
// # What it checks
//
//   - Name is not empty, and two instances give the same.
//   - Quantiles writes exactly len(levels) values: -Inf at levels <= 0,
//     +Inf at levels >= 1, finite values otherwise, non-decreasing in the
//     level for sorted levels, and the same values for the levels in another
//     order; from the first call on, before any data.
//   - Quantiles does not allocate at steady state (testing.AllocsPerRun).
//   - Determinism: two instances fed the same calls give bit-identical
//     quantiles.
//   - Coverage: over the last 45 days, after 45 days of warm-up, the share of
//     outcomes at or below the 0.1, 0.5 and 0.9 quantiles (every lead bucket
//     pooled, night intervals of PV left out as the actor does) is within
//     0.06 of the level. Learning goes on meanwhile: each forecast is judged
//     on data it has not seen, as in operation.
package modeltest

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/solar"
)

const (
	stepMinutes = 15
	perDay      = 24 * 60 / stepMinutes
	warmDays    = 45
	testDays    = 45
	maxLead     = 40 * 60 // minutes
	// tolerance is how far from its level the share of outcomes at or below
	// a quantile may be, over the evaluation weeks.
	tolerance = 0.06
	maxReport = 5 // messages reported per kind of failure
)

// startTime is the start of the first interval fed: the evaluation weeks
// are centred on the June solstice.
func startTime() time.Time { return time.Date(2026, 4, 23, 0, 0, 0, 0, time.UTC) }

// checkLevels are the levels of every Quantiles call, sorted: beyond (0, 1)
// on both sides, the edges, the tails and the default grid.
func checkLevels() []float64 {
	l := []float64{-0.5, 0, 0.001, 0.01}
	l = append(l, model.DefaultLevels()...)
	return append(l, 0.99, 0.999, 1, 1.5)
}

// nCov is the number of levels judged for coverage.
const nCov = 3

// coverageLevels are judged for coverage; each is one of checkLevels.
func coverageLevels() [nCov]float64 { return [nCov]float64{0.1, 0.5, 0.9} }

func ptr(v float64) *float64 { return &v }

// sites returns the invented sites of the suite.
func sites() []model.Site {
	return []model.Site{
		{ID: "pv-gannet-moor", Kind: model.KindPV, CapacityMW: 20, Lat: ptr(43.2), Lon: ptr(-31.5)},
		{ID: "wind-skerry-vane", Kind: model.KindWind, CapacityMW: 50, HubHeightM: ptr(95)},
	}
}

// Run runs the conformance suite on forecasters made by newF, one subtest
// per invented site. newF is called twice per site (the determinism check
// needs two instances) and must give a fresh forecaster each time, with the
// lead buckets of model.DefaultBuckets.
func Run(t *testing.T, newF func(site model.Site) model.Forecaster) {
	t.Helper()
	for i, s := range sites() {
		t.Run(s.ID, func(t *testing.T) {
			t.Helper()
			h := generate(s, uint64(i+1))
			r := replay(h, newF(s), newF(s))
			r.report(t)
		})
	}
}

// history is one site's synthetic history: per interval i (starting at
// startTime() + i x 15 min) the outcome and the night flag, and per (interval,
// lead bucket) the forecast issued for it.
type history struct {
	site    model.Site
	buckets model.Buckets // nb = buckets.Len()
	n       int
	y       []float64
	night   []bool
	// feats[i*nb+b] is the forecast issued for interval i in bucket b,
	// issued at the start of interval issue[i*nb+b] (negative: none, its
	// issue time would be before the history).
	feats []model.Features
	issue []int
	// byIssue[s] lists the feats indices issued at interval s.
	byIssue [][]int
}

// generate makes a site's history from a seeded generator.
func generate(site model.Site, seed uint64) *history {
	rng := rand.New(rand.NewPCG(seed, 0x706c756d62)) // the suite's own stream per site
	n := (warmDays + testDays) * perDay
	buckets := model.DefaultBuckets()
	nb := buckets.Len()
	h := &history{
		site:    site,
		buckets: buckets,
		n:       n,
		y:       make([]float64, n),
		night:   make([]bool, n),
		feats:   make([]model.Features, n*nb),
		issue:   make([]int, n*nb),
		byIssue: make([][]int, n),
	}
	step := stepMinutes * time.Minute
	pv := site.Kind == model.KindPV
	// The driver's latent index: AR(1), unit variance, correlation time 2 h
	// (PV, clouds) or 3 h (wind).
	tau := 180.0
	if pv {
		tau = 120
	}
	phi := math.Exp(-stepMinutes / tau)
	z := make([]float64, n)
	z[0] = rng.NormFloat64()
	for i := 1; i < n; i++ {
		z[i] = phi*z[i-1] + math.Sqrt(1-phi*phi)*rng.NormFloat64()
	}
	clear := make([]float64, n)  // PV: clear-sky GHI at mid-interval
	latent := make([]float64, n) // PV: clear-sky index; wind: speed
	for i := range n {
		t0 := startTime().Add(time.Duration(i) * step)
		if pv {
			lat, lon := *site.Lat, *site.Lon
			zen, _ := solar.Position(t0.Add(step/2), lat, lon)
			clear[i] = solar.Haurwitz(zen)
			h.night[i] = sunDown(t0, lat, lon) && sunDown(t0.Add(step/2), lat, lon) && sunDown(t0.Add(step), lat, lon)
			latent[i] = clamp(0.7+0.25*z[i], 0.05, 1)
			pu := pvCurve(clear[i] * latent[i])
			h.y[i] = site.CapacityMW * (pu + (0.005+0.03*pu)*rng.NormFloat64())
		} else {
			latent[i] = weibull(z[i], 8.5, 2)
			h.y[i] = site.CapacityMW * (windCurve(latent[i]) + 0.03*rng.NormFloat64())
		}
	}
	// Each forecast's driver comes as the one variable of a weather row of
	// its own, as a run would give it.
	vars := []string{"wind_ms"}
	if pv {
		vars = []string{"ghi_wm2"}
	}
	rows := make([]model.WeatherRow, n*nb)
	for i := range n {
		t0 := startTime().Add(time.Duration(i) * step)
		mid := t0.Add(step / 2)
		for b := range nb {
			k := i*nb + b
			lo := buckets.Edges[b]
			hi := maxLead + stepMinutes
			if b+1 < nb {
				hi = buckets.Edges[b+1]
			}
			lead := lo + stepMinutes*rng.IntN((hi-lo)/stepMinutes)
			// The error of the weather run's driver grows with lead.
			e := rng.NormFloat64()
			s := i - lead/stepMinutes
			h.issue[k] = s
			if s < 0 {
				continue
			}
			h.byIssue[s] = append(h.byIssue[s], k)
			last := math.NaN()
			if s > 0 {
				last = h.y[s-1]
			}
			var driver float64
			if pv {
				driver = clear[i] * clamp(latent[i]+(0.05+0.15*float64(lead)/maxLead)*e, 0, 1.1)
			} else {
				driver = math.Max(0, latent[i]+(0.4+1.6*float64(lead)/maxLead)*e)
			}
			h.feats[k] = model.Features{
				ValidStart:    t0,
				ValidMinutes:  stepMinutes,
				LeadMinutes:   lead,
				Bucket:        b,
				CapacityMW:    site.CapacityMW,
				Availability:  1,
				Driver:        driver,
				RunAgeMinutes: float64(s * stepMinutes % 360), // a run every 6 h
				LastPowerMW:   last,
				Night:         h.night[i],
				HourUTC:       float64(mid.Hour()) + float64(mid.Minute())/60,
				Weather:       &rows[k],
				WeatherVars:   vars,
			}
			rows[k] = model.WeatherRow{ValidStart: t0, ValidMinutes: stepMinutes, Values: []float64{driver}}
		}
	}
	return h
}

// sunDown reports whether the sun is more than a degree below the horizon,
// the actor's test.
func sunDown(t time.Time, lat, lon float64) bool {
	zen, _ := solar.Position(t, lat, lon)
	return zen > 91
}

func clamp(x, lo, hi float64) float64 { return math.Max(lo, math.Min(hi, x)) }

// pvCurve is the PV plant's per-unit output for an irradiance: a
// performance ratio of 0.85, at most 1.
func pvCurve(ghi float64) float64 { return math.Min(1, ghi/1000*0.85) }

// windCurve is the wind farm's per-unit output for a speed: cubic from
// 3 m/s to rated at 12 m/s (no cut-out: the suite wants a monotone curve).
func windCurve(v float64) float64 { return clamp((v*v*v-27)/(1728-27), 0, 1) }

// weibull maps a standard normal z to a Weibull(scale, shape) value with the
// same cumulative probability.
func weibull(z, scale, shape float64) float64 {
	sf := 0.5 * math.Erfc(z/math.Sqrt2) // 1 - Phi(z), accurate in the tail
	return scale * math.Pow(-math.Log(sf), 1/shape)
}

// messages keeps the first few failures of one kind and counts the rest.
type messages struct {
	first []string
	n     int
}

func (m *messages) addf(format string, args ...any) {
	m.n++
	if len(m.first) < maxReport {
		m.first = append(m.first, fmt.Sprintf(format, args...))
	}
}

func (m *messages) report(t *testing.T, what string) {
	t.Helper()
	for _, s := range m.first {
		t.Error(s)
	}
	if m.n > len(m.first) {
		t.Errorf("%s: %d more failures", what, m.n-len(m.first))
	}
}

// result is what a replay found.
type result struct {
	site          model.Site
	buckets       model.Buckets
	name1, name2  string
	structure     messages
	order         messages
	determinism   messages
	allocs        float64
	allocsChecked bool
	// hits[b][c] counts evaluation outcomes at or below the coverageLevels()[c]
	// quantile in bucket b; settled[b] the outcomes judged.
	hits    [][nCov]int
	settled []int
	calls   int
}

// replay plays the actor's part for two instances fed the same calls. It
// does not change h.
func replay(h *history, f1, f2 model.Forecaster) *result {
	nb := h.buckets.Len()
	r := &result{buckets: h.buckets, site: h.site, name1: f1.Name(), name2: f2.Name(), hits: make([][nCov]int, nb), settled: make([]int, nb)}
	levels := checkLevels()
	nl := len(levels)
	cov := [nCov]int{}
	for c, l := range coverageLevels() {
		cov[c] = slices.Index(levels, l)
	}
	// A fixed permutation of the levels: reversed, then the halves swapped.
	perm := make([]int, nl)
	for j := range perm {
		perm[j] = (nl - 1 - j + nl/2) % nl
	}
	permLevels := make([]float64, nl)
	for j, p := range perm {
		permLevels[j] = levels[p]
	}
	// dst lies inside a larger buffer whose ends must stay untouched.
	buf1 := make([]float64, nl+2)
	buf2 := make([]float64, nl+2)
	bufP := make([]float64, nl+2)
	q := make([]float64, len(h.feats)*nCov) // kept for scoring
	// The actor's pending records: overwritten once settled, so the
	// history itself stays intact for another replay.
	feats := slices.Clone(h.feats)
	var xs []*model.Features
	var steady model.Features // a daytime forecast of the last day
	evalFrom := warmDays * perDay
	for s := range h.n {
		// Issue at the start of interval s: the forecaster has learned the
		// outcomes up to interval s-1.
		for _, k := range h.byIssue[s] {
			x := &feats[k]
			d1 := call(f1, x, levels, buf1)
			d2 := call(f2, x, levels, buf2)
			r.calls++
			r.checkStructure(x, levels, buf1, d1)
			for j := range d1 {
				if math.Float64bits(d1[j]) != math.Float64bits(d2[j]) {
					r.determinism.addf("%s: two instances fed the same data differ: valid %s lead %d min, level %v: %v and %v",
						h.site.ID, x.ValidStart.Format(time.RFC3339), x.LeadMinutes, levels[j], d1[j], d2[j])
					break
				}
			}
			if pq, ok := f2.(model.PairQuantiler); ok && k%5 == 0 {
				// Both lists of a pair call as two calls give them.
				ra, rb := make([]float64, len(levels)), make([]float64, len(permLevels))
				pq.QuantilesPair(ra, levels, rb, permLevels, x)
				pb := call(f2, x, permLevels, bufP)
				if !model.SameBits(ra, d2) || !model.SameBits(rb, pb) {
					r.determinism.addf("%s: QuantilesPair differs from two Quantiles calls: valid %s lead %d min",
						h.site.ID, x.ValidStart.Format(time.RFC3339), x.LeadMinutes)
				}
			}
			if k%7 == 0 {
				dp := call(f1, x, permLevels, bufP)
				for j, p := range perm {
					a, b := dp[j], d1[p]
					if a != b && !(math.Abs(a-b) <= 1e-9*(1+math.Abs(b))) {
						r.order.addf("%s: level %v gives %v among unsorted levels, %v among sorted ones (valid %s, lead %d min)",
							h.site.ID, levels[p], a, b, x.ValidStart.Format(time.RFC3339), x.LeadMinutes)
						break
					}
				}
			}
			for c, j := range cov {
				q[k*nCov+c] = d1[j]
			}
			if !x.Night && s >= h.n-perDay {
				steady = *x
			}
		}
		// Interval s settles.
		xs = xs[:0]
		for b := range nb {
			k := s*nb + b
			if h.issue[k] < 0 || h.night[s] {
				continue
			}
			xs = append(xs, &feats[k])
			if s >= evalFrom {
				r.settled[b]++
				for c := range coverageLevels() {
					if h.y[s] <= q[k*nCov+c] {
						r.hits[b][c]++
					}
				}
			}
		}
		if len(xs) > 0 {
			f1.Learn(h.y[s], xs)
			f2.Learn(h.y[s], xs)
		}
		for b := range nb {
			poison(&feats[s*nb+b])
		}
	}
	if !steady.ValidStart.IsZero() {
		dst := make([]float64, nl)
		r.allocs = testing.AllocsPerRun(200, func() { f1.Quantiles(dst, &steady, levels) })
		r.allocsChecked = true
	}
	return r
}

// sentinelBits marks the buffer cells around dst, and dst itself, before a
// call: a NaN with a payload of its own, so a cell still holding it was not
// written.
const sentinelBits = 0x7ff8_dead_beef_0001

// call fills buf with the sentinel, asks f for the quantiles into
// buf[1:len(levels)+1] and returns that slice; buf has len(levels)+2 cells.
func call(f model.Forecaster, x *model.Features, levels, buf []float64) []float64 {
	for j := range buf {
		buf[j] = math.Float64frombits(sentinelBits)
	}
	dst := buf[1 : len(levels)+1 : len(levels)+1]
	f.Quantiles(dst, x, levels)
	return dst
}

// poison overwrites settled features, as the actor reuses its records.
func poison(x *model.Features) {
	nan := math.NaN()
	*x = model.Features{
		ValidMinutes: -1, LeadMinutes: -1, Bucket: -1,
		CapacityMW: nan, Availability: nan, Driver: nan, RunAgeMinutes: nan, LastPowerMW: nan, HourUTC: nan,
	}
}

// checkStructure checks one Quantiles call at sorted levels.
func (r *result) checkStructure(x *model.Features, levels, buf, dst []float64) {
	where := func() string {
		return fmt.Sprintf("%s: valid %s lead %d min", r.site.ID, x.ValidStart.Format(time.RFC3339), x.LeadMinutes)
	}
	if math.Float64bits(buf[0]) != sentinelBits || math.Float64bits(buf[len(buf)-1]) != sentinelBits {
		r.structure.addf("%s: Quantiles wrote outside dst", where())
		return
	}
	for j, l := range levels {
		v := dst[j]
		switch {
		case math.Float64bits(v) == sentinelBits:
			r.structure.addf("%s: level %v: Quantiles did not write dst[%d]", where(), l, j)
			return
		case l <= 0 && !math.IsInf(v, -1):
			r.structure.addf("%s: level %v: got %v, want -Inf", where(), l, v)
			return
		case l >= 1 && !math.IsInf(v, 1):
			r.structure.addf("%s: level %v: got %v, want +Inf", where(), l, v)
			return
		case l > 0 && l < 1 && (math.IsNaN(v) || math.IsInf(v, 0)):
			r.structure.addf("%s: level %v: got %v, want a finite value", where(), l, v)
			return
		case j > 0 && v < dst[j-1]:
			r.structure.addf("%s: quantiles cross: level %v gives %v, below %v at level %v", where(), l, v, dst[j-1], levels[j-1])
			return
		}
	}
}

// report turns a replay's findings into subtests.
func (r *result) report(t *testing.T) {
	t.Helper()
	t.Run("Name", func(t *testing.T) {
		if r.name1 == "" {
			t.Error("Name is empty")
		}
		if r.name1 != r.name2 {
			t.Errorf("two instances are named %q and %q", r.name1, r.name2)
		}
	})
	t.Run("Quantiles", func(t *testing.T) {
		if r.calls == 0 {
			t.Fatal("the suite made no Quantiles call")
		}
		r.structure.report(t, "quantiles")
		r.order.report(t, "unsorted levels")
	})
	t.Run("Allocs", func(t *testing.T) {
		if !r.allocsChecked {
			t.Fatal("no daytime forecast on the last day to measure")
		}
		if r.allocs > 0 {
			t.Errorf("Quantiles allocates %v times per call at steady state, want 0", r.allocs)
		}
	})
	t.Run("Deterministic", func(t *testing.T) {
		r.determinism.report(t, "determinism")
	})
	t.Run("Coverage", func(t *testing.T) {
		var total int
		for _, n := range r.settled {
			total += n
		}
		if total == 0 {
			t.Fatal("no outcome judged")
		}
		for c, l := range coverageLevels() {
			var hits int
			per := ""
			for b := range r.settled {
				hits += r.hits[b][c]
				if r.settled[b] > 0 {
					per += fmt.Sprintf(" %s:%.3f", r.buckets.Name(b), float64(r.hits[b][c])/float64(r.settled[b]))
				}
			}
			share := float64(hits) / float64(total)
			t.Logf("level %v: share at or below %.4f over %d outcomes; by lead bucket%s", l, share, total, per)
			if math.Abs(share-l) > tolerance {
				t.Errorf("level %v: share of outcomes at or below the quantile %.4f, want within %v of the level (%d outcomes)", l, share, tolerance, total)
			}
		}
	})
}
