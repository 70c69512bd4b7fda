package model

import (
	"math"
	"slices"
	"time"

	"github.com/plumb-forecast/plumb/model/analog"
	"github.com/plumb-forecast/plumb/model/forest"
	"github.com/plumb-forecast/plumb/model/qr"
	"github.com/plumb-forecast/plumb/model/solar"
	"github.com/plumb-forecast/plumb/model/wind"
)

// StackOptions configures the Stack forecaster. Zero fields take the
// documented defaults.
type StackOptions struct {
	// Forest configures the quantile regression forest; its zero value
	// takes forest's defaults, except Trees (0 means 60) and MinLeaf
	// (0 means 10), chosen by backtest for refit cost against skill.
	Forest forest.Options
	// MinRows is how many settled daytime intervals with weather the
	// site needs before its first forest; 0 means 24*21 (three weeks of
	// hourly data).
	MinRows int
	// MaxRows is how many of the latest such intervals a forest is grown
	// on; 0 means 17520 (two years of hourly data). The Stack keeps
	// 2*max(RefitRows, InstallAfter) rows more, so that a snapshot can
	// grow the forest in use and a fit in flight again (MarshalBinary).
	MaxRows int
	// RefitGrowth: a new forest is grown once the rows added since the
	// last one reach RefitGrowth times the rows it was grown on, or
	// RefitRows, whichever is fewer; 0 means 0.5.
	RefitGrowth float64
	// RefitRows: see RefitGrowth; 0 means 24*60 (two months of hourly data).
	RefitRows int
	// InstallAfter is how many settlements after a refit starts its forest
	// is put in use. The fit runs on its own goroutine meanwhile; if it
	// has not finished then, the settlement waits for it. Installing at a
	// fixed count keeps replays byte-identical whatever the machine's
	// speed. 0 means 24.
	InstallAfter int
	// CacheRows is how many weather rows' forest quantiles are kept; 0
	// means 2048.
	CacheRows int
	// Learner chooses the first layer: LearnerForest (the default, "") or
	// LearnerAnalog, the alternative it was raced against by backtest
	// (see the README's model section).
	Learner string
	// Analog configures the analog ensemble of LearnerAnalog.
	Analog analog.Options
}

// First layers of the Stack (StackOptions.Learner).
const (
	LearnerForest = ""
	LearnerAnalog = "analog"
)

func (o StackOptions) withDefaults() StackOptions {
	if o.Forest.Trees <= 0 {
		o.Forest.Trees = 60
	}
	if o.Forest.MinLeaf <= 0 {
		o.Forest.MinLeaf = 10
	}
	if o.MinRows <= 0 {
		o.MinRows = 24 * 21
	}
	if o.MaxRows <= 0 {
		o.MaxRows = 17520
	}
	if o.RefitGrowth <= 0 {
		o.RefitGrowth = 0.5
	}
	if o.RefitRows <= 0 {
		o.RefitRows = 24 * 60
	}
	if o.InstallAfter <= 0 {
		o.InstallAfter = 24
	}
	if o.CacheRows <= 0 {
		o.CacheRows = 2048
	}
	return o
}

// Stack is plumb's full forecaster, three layers deep:
//
//  1. A quantile regression forest (Meinshausen 2006, model/forest) on the
//     weather run's variables, the time of day and year, and the physical
//     layer (clear-sky potential for a PV site with a location; wind speed
//     and the learned monotone power curve for a wind site). It is regrown
//     on the site's own history, off the hot path, as the history grows;
//     until the first one is grown, and for intervals no weather run
//     covers, the Baseline stands in. A training row reads the curve
//     feature off the curve as it stands when the row is learned; a
//     forecast reads it off the curve as it stood when the forest in use
//     was put in use, so that a row's forest quantiles stay the same for
//     as long as that forest is in use (they are cached), whenever it is
//     first asked for.
//  2. An online linear quantile regression per (lead bucket, level)
//     (model/qr, scale-free steps) on the distance of smart persistence
//     from the base median, the base quantile's distance from its median,
//     and the clear-sky potential: it learns, per lead, how much the
//     latest reading moves the forecast (intraday updating: the weight of
//     the observed error falls with lead because the data say so), how
//     much the spread shrinks, and corrects bias between refits.
//     Smart persistence is the latest reading's clear-sky index times the
//     clear-sky potential of the target interval for PV with a location,
//     and the latest reading otherwise.
//  3. The quantiles of a fixed grid of levels (the worker's levels plus
//     0.01 and 0.99) are sorted (rearrangement, Chernozhukov et al. 2010)
//     and read at any level by linear interpolation.
//
// Everything is per unit of available capacity inside.
type Stack struct {
	kind    Kind
	o       StackOptions
	buckets Buckets
	grid    []float64
	base    *Baseline

	hasLoc         bool
	lat, lon       float64
	sinLat, cosLat float64
	sun            [2]sunDay   // the two latest days potential computed for
	potCache       [2]potMemo  // [1]: the potential of the latest reading
	potTab         []potMemo   // potentials of steps, by minute (potentials)
	curve          *wind.Curve // wind sites only
	// fcurve is curve as it stood when the forest in use was put in use:
	// the forest's features are read off it (wind sites with a forest).
	fcurve *wind.Curve

	// Site weather columns, fixed by the first run seen; colKey and colMap
	// map the latest run's Vars onto them.
	cols   []string
	colKey *string
	colMap []int
	p      int // forest features

	// Training ring of forest rows. Counting every row ever added from 0,
	// row i is at slot i % ringRows() (p floats of trX, one of trY), and
	// the rows held are those from max(trLo, trTotal-ringRows()) to
	// trTotal; len(trY) is min(trTotal, ringRows()). A fit is grown on the
	// latest min(trTotal, MaxRows) rows only: the ring holds more, so that
	// the rows of the forest in use and of a fit in flight are still there
	// for a snapshot to regrow them (see MarshalBinary).
	trX     []float64
	trY     []float64
	trTotal int // rows ever added
	trLo    int // no row before it is held (set by UnmarshalBinary)
	// Rows added since the last fit started, and rows it was grown on.
	added, lastN int

	forest rowLearner // the first layer in use (a forest, or analogs)
	inst   fitLaunch  // the launch of forest (n 0 when there is none)
	fitCh  chan fitResult
	flight fitLaunch // the launch of the fit in flight, when fitCh is not nil
	fitAge int
	fitErr error
	fits   int

	cache map[*WeatherRow]int32
	slab  []float64
	fx    []float64 // forest feature row

	corr []*qr.Online // [bucket*len(grid)+k]
	z    [corrDim]float64
	// cw holds the prediction weights of corr, corrDim per learner in
	// corr's order; a bucket's are valid when cwGen[bucket] == gen+1
	// (the weights change only in Learn).
	cw    []float64
	cwGen []uint64

	gen  uint64
	memo stackMemo
	// pair: the last QuantilesPair answer, given again while the grid and
	// the levels stay (steps that share a weather row); one: the same for
	// Quantiles.
	pair stackPair
	one  stackOne
	plan gridPlan // of the last levels read that are not the setup's
	// levels are the setup's levels, at grid[levelIdx[j]].
	levels   []float64
	levelIdx []int
	// A PV plane of known tilt (and azimuth, NaN if unknown), and the
	// positions in cols of the temperature and 10 m wind columns (-1 if
	// absent).
	tilted                                             bool
	tilt, az                                           float64
	tempCol, u10Col, v10Col, u100Col, v100Col, presCol int
	hub                                                float64   // a wind site's hub height (m), 0 if unknown
	bq                                                 []float64 // base grid quantiles, per unit
}

const corrDim = 4

type fitResult struct {
	f   rowLearner
	err error
}

// rowLearner is the Stack's first layer, fitted: it writes the quantiles
// at levels of the outcome of a case with predictors x. It is used from
// the Stack's goroutine only.
type rowLearner interface {
	quantiles(dst, x, levels []float64)
}

// forestLearner is a quantile regression forest with its scratch space.
type forestLearner struct {
	f  *forest.Forest
	sc forest.Scratch
}

func (l *forestLearner) quantiles(dst, x, levels []float64) { l.f.Quantiles(dst, x, levels, &l.sc) }

// analogLearner is an analog ensemble.
type analogLearner struct{ a *analog.Analogs }

func (l analogLearner) quantiles(dst, x, levels []float64) { l.a.Quantiles(dst, x, levels) }

// grow fits the first layer chosen by o on n = len(y) rows of X (row-major,
// p columns).
func grow(X []float64, p int, y []float64, o StackOptions) (rowLearner, error) {
	if o.Learner == LearnerAnalog {
		a, err := analog.Fit(X, p, y, o.Analog)
		if err != nil {
			return nil, err
		}
		return analogLearner{a}, nil
	}
	f, err := forest.Fit(X, p, y, o.Forest)
	if err != nil {
		return nil, err
	}
	return &forestLearner{f: f}, nil
}

// fitLaunch records where the training ring stood when a fit started:
// at rows had been added, and the fit was grown on the latest n of them
// (min(at, MaxRows)). The same rows, in the same order, grow the same
// forest again (forest.Fit is deterministic).
type fitLaunch struct {
	at, n int
}

// ringRows is how many rows the training ring holds: MaxRows for the next
// fit, and room for the rows added since the forest in use and a fit in
// flight were launched (at most about RefitRows, or InstallAfter, each).
func (s *Stack) ringRows() int {
	return s.o.MaxRows + 2*max(s.o.RefitRows, s.o.InstallAfter)
}

// fitRows returns a copy of the rows a fit launched at l is grown on: the
// rows in [l.at-l.n, l.at), ordered as a ring of MaxRows rows held them
// (row i at position i % MaxRows), the order fits were always grown in.
// The rows must be held.
func (s *Stack) fitRows(l fitLaunch) (X, y []float64) {
	p, c, m := s.p, s.ringRows(), s.o.MaxRows
	X, y = make([]float64, l.n*p), make([]float64, l.n)
	base := l.at - l.n
	for j := range l.n {
		i := base + ((j-base)%m+m)%m // the row in [base, base+m) at position j
		k := i % c
		copy(X[j*p:(j+1)*p], s.trX[k*p:(k+1)*p])
		y[j] = s.trY[k]
	}
	return X, y
}

// stackMemo is the latest grid of corrected quantiles; the worker asks
// twice per step (nominal and calibrated levels) with the same features.
type stackMemo struct {
	ok           bool
	ver          uint64 // counts the grids computed
	gen          uint64
	start        time.Time
	lead, bucket int
	row          *WeatherRow
	last, avail  uint64
	night        bool
	potNow       float64
	potLast      float64
	q            []float64
}

// NewStack returns a Stack forecaster for site.
func NewStack(site Site, setup Setup, o StackOptions) *Stack {
	setup = setup.withDefaults()
	o = o.withDefaults()
	grid := append(slices.Clone(setup.Levels), 0.01, 0.99)
	slices.Sort(grid)
	grid = slices.Compact(grid)
	s := &Stack{
		kind:    site.Kind,
		o:       o,
		buckets: setup.Buckets,
		grid:    grid,
		base:    NewBaseline(site.Kind, BaselineOptions{Buckets: setup.Buckets}),
		cache:   make(map[*WeatherRow]int32),
		bq:      make([]float64, len(grid)),
		memo:    stackMemo{q: make([]float64, len(grid))},
		levels:  setup.Levels,
	}
	for _, l := range setup.Levels {
		k, _ := slices.BinarySearch(grid, l)
		s.levelIdx = append(s.levelIdx, k)
	}
	if site.HasLocation() {
		s.hasLoc, s.lat, s.lon = true, *site.Lat, *site.Lon
		s.sinLat, s.cosLat = math.Sin(s.lat*math.Pi/180), math.Cos(s.lat*math.Pi/180)
		if site.Kind == KindPV && site.TiltDeg != nil && *site.TiltDeg > 0 && *site.TiltDeg <= 180 {
			// A known plane: the physical layer works on the plane of
			// array (an unknown azimuth faces the equator).
			s.tilted, s.tilt, s.az = true, *site.TiltDeg, math.NaN()
			if site.AzimuthDeg != nil {
				s.az = *site.AzimuthDeg
			}
		}
	}
	if site.Kind == KindWind {
		if site.HubHeightM != nil && *site.HubHeightM > 0 {
			s.hub = *site.HubHeightM
		}
		s.curve = wind.NewCurve(wind.CurveOptions{})
	}
	s.corr = make([]*qr.Online, setup.Buckets.Len()*len(grid))
	for b := 0; b < setup.Buckets.Len(); b++ {
		for k, l := range grid {
			s.corr[b*len(grid)+k] = qr.NewOnline(corrDim, l, qr.OnlineOptions{})
		}
	}
	return s
}

// Name implements Forecaster.
func (s *Stack) Name() string {
	if s.o.Learner == LearnerAnalog {
		return "stack-analog"
	}
	return "stack"
}

// Fits returns how many forests have been put in use, and the error of the
// latest fit that failed (nil if none failed).
func (s *Stack) Fits() (int, error) { return s.fits, s.fitErr }

// mapCols points colMap at the site columns of a run's vars, fixing the
// site's columns on the first run seen.
func (s *Stack) mapCols(vars []string) {
	if len(vars) == 0 {
		return
	}
	if s.colKey == &vars[0] {
		return
	}
	if s.cols == nil {
		s.setCols(slices.Clone(vars))
	}
	s.colMap = s.colMap[:0]
	for _, c := range s.cols {
		s.colMap = append(s.colMap, slices.Index(vars, c))
	}
	s.colKey = &vars[0]
}

// setCols fixes the weather columns the forest reads (the first run's).
func (s *Stack) setCols(cols []string) {
	s.cols = cols
	s.p = len(s.cols) + s.extraFeatures()
	s.fx = make([]float64, s.p)
	s.tempCol, s.u10Col, s.v10Col = slices.Index(s.cols, "temp_c"), slices.Index(s.cols, "u10_ms"), slices.Index(s.cols, "v10_ms")
	s.u100Col, s.v100Col, s.presCol = slices.Index(s.cols, "u100_ms"), slices.Index(s.cols, "v100_ms"), slices.Index(s.cols, "pressure_hpa")
}

// extraFeatures counts the forest features beyond the weather columns:
// time of day and of year as sine and cosine pairs, plus the physical
// layer (PV with a location: clear-sky potential; wind: speed and the
// learned curve).
func (s *Stack) extraFeatures() int {
	n := 4
	switch {
	case s.kind == KindPV && s.hasLoc && s.tilted:
		n += 2
	case s.kind == KindPV && s.hasLoc:
		n++
	case s.kind == KindWind:
		n += 2
	}
	return n
}

// features writes the forest features of a weather row to s.fx; driver is
// the row's main driver as the worker read it (Features.Driver), and curve
// the wind power curve to read (nil for PV).
func (s *Stack) features(row *WeatherRow, vars []string, driver float64, curve *wind.Curve) {
	s.mapCols(vars)
	fx := s.fx
	for i, j := range s.colMap {
		if j >= 0 && j < len(row.Values) {
			fx[i] = row.Values[j]
		} else {
			fx[i] = math.NaN()
		}
	}
	mid := row.ValidStart.Add(time.Duration(row.ValidMinutes) * time.Minute / 2).UTC()
	k := len(s.cols)
	h := (float64(mid.Hour()) + float64(mid.Minute())/60) / 24 * 2 * math.Pi
	d := float64(mid.YearDay()) / 365.25 * 2 * math.Pi
	fx[k], fx[k+1], fx[k+2], fx[k+3] = math.Sin(h), math.Cos(h), math.Sin(d), math.Cos(d)
	k += 4
	switch {
	case s.kind == KindPV && s.hasLoc:
		fx[k] = s.potential(mid)
		if s.tilted {
			// The forecast irradiance on the plane, derated for the
			// forecast temperature and wind where the run has them.
			fx[k+1] = solar.PVPotential(mid, s.lat, s.lon, driver, s.rowValue(row, s.tempCol), s.rowWind(row), s.tilt, s.az)
		}
	case s.kind == KindWind:
		v := s.windSpeed(row, vars, driver)
		fx[k] = v
		fx[k+1] = curve.Eval(v)
	}
}

// potential is the clear-sky potential of a PV site with a location at t:
// Haurwitz clear-sky GHI over 1000 W/m2 (METHODS.md section 1), 0 with
// the sun down. The sun's declination and the equation of time are taken
// at noon UTC of t's day (they move by at most 0.4 degrees and half a
// minute in a day: plenty for a predictor) and kept for the next call, so
// a refresh computes them once or twice, not at every step.
func (s *Stack) potential(t time.Time) float64 {
	day := t.Unix() / 86400
	if t.Unix() < 0 && t.Unix()%86400 != 0 {
		day--
	}
	c := &s.sun[0]
	if c.day != day || !c.ok {
		if s.sun[1].ok && s.sun[1].day == day {
			s.sun[0], s.sun[1] = s.sun[1], s.sun[0]
		} else {
			s.sun[1] = s.sun[0]
			decl, eot := solar.Declination(time.Unix(day*86400+43200, 0))
			s.sun[0] = sunDay{ok: true, day: day, sinDecl: math.Sin(decl * math.Pi / 180), cosDecl: math.Cos(decl * math.Pi / 180), eot: eot}
		}
		c = &s.sun[0]
	}
	minutes := float64(t.Unix()-day*86400) / 60
	hourAngle := (minutes+c.eot+4*s.lon)/4 - 180
	cz := s.sinLat*c.sinDecl + s.cosLat*c.cosDecl*math.Cos(hourAngle*math.Pi/180)
	if cz <= 0 {
		return 0
	}
	clear := 1.098 * cz * math.Exp(-0.059/cz) // Haurwitz, per 1000 W/m2
	if s.tilted {
		// On the plane: Erbs, incidence and plane-of-array irradiance of
		// the clear sky (no temperature derate: the potential of the sky).
		return solar.PVPotential(t, s.lat, s.lon, 1000*clear, math.NaN(), math.NaN(), s.tilt, s.az)
	}
	return clear
}

// rowValue returns row's value of the column at index c of s.cols (its
// position in the row found by mapCols), NaN if c < 0 or it is missing.
func (s *Stack) rowValue(row *WeatherRow, c int) float64 {
	if c < 0 || c >= len(s.colMap) {
		return math.NaN()
	}
	if j := s.colMap[c]; j >= 0 && j < len(row.Values) {
		return row.Values[j]
	}
	return math.NaN()
}

// windSpeed returns the wind speed the wind layer works with for a row
// whose driver (Features.Driver) is given: carried to the hub height by the
// power law when the site gives one and the row has speeds at 10 m and
// 100 m (the exponent measured between them), then normalised to the
// reference air density when the row has temperature and pressure
// (METHODS.md section 2). Without those it is the driver.
func (s *Stack) windSpeed(row *WeatherRow, vars []string, driver float64) float64 {
	if row == nil || len(vars) == 0 || math.IsNaN(driver) {
		return driver
	}
	s.mapCols(vars)
	v := driver
	if s.hub > 0 {
		v10 := math.Hypot(s.rowValue(row, s.u10Col), s.rowValue(row, s.v10Col))
		v100 := math.Hypot(s.rowValue(row, s.u100Col), s.rowValue(row, s.v100Col))
		if a := wind.ShearExponent(v10, 10, v100, 100); !math.IsNaN(a) {
			v = wind.HubSpeed(v100, 100, s.hub, a)
		}
	}
	return wind.NormalizeSpeed(v, wind.AirDensity(s.rowValue(row, s.presCol), s.rowValue(row, s.tempCol)))
}

// rowWind returns the row's 10 m wind speed (from u10_ms and v10_ms), NaN
// if it has none.
func (s *Stack) rowWind(row *WeatherRow) float64 {
	return math.Hypot(s.rowValue(row, s.u10Col), s.rowValue(row, s.v10Col))
}

// sunDay is the sun's declination and equation of time (minutes) of one
// UTC day (days since the Unix epoch).
type sunDay struct {
	ok               bool
	day              int64
	sinDecl, cosDecl float64
	eot              float64
}

// forestGrid returns the forest's quantiles at the grid for a row, cached.
func (s *Stack) forestGrid(x *Features) []float64 {
	g := len(s.grid)
	if i, ok := s.cache[x.Weather]; ok {
		return s.slab[int(i)*g : int(i+1)*g]
	}
	if len(s.cache) >= s.o.CacheRows {
		clear(s.cache)
		s.slab = s.slab[:0]
	}
	s.features(x.Weather, x.WeatherVars, x.Driver, s.fcurve)
	i := len(s.cache)
	s.slab = slices.Grow(s.slab, g)[:(i+1)*g]
	q := s.slab[i*g : (i+1)*g]
	s.forest.quantiles(q, s.fx, s.grid)
	s.cache[x.Weather] = int32(i)
	return q
}

// baseGrid writes to s.bq the first layer's quantiles at the grid, per
// unit of available capacity u.
func (s *Stack) baseGrid(x *Features, u float64) {
	if s.forest != nil && x.Weather != nil && len(x.WeatherVars) > 0 {
		copy(s.bq, s.forestGrid(x))
		return
	}
	s.base.Quantiles(s.bq, x, s.grid)
	for k := range s.bq {
		s.bq[k] /= u
	}
}

// potentials returns the clear-sky potential of x's interval and of the
// interval of the latest reading before its issue (both 0 for a site
// without a location, or wind).
func (s *Stack) potentials(x *Features) (potNow, potLast float64) {
	if s.kind != KindPV || !s.hasLoc {
		return 0, 0
	}
	// potLast is the same for every step of a refresh, and a refresh
	// asks for the steps the previous one asked for, but one: the
	// potentials of the steps are kept in a small table by minute (a
	// horizon of up to potTable steps does not collide).
	half := time.Duration(x.ValidMinutes) * time.Minute / 2
	now := x.ValidStart.Add(half).Unix()
	if s.potTab == nil {
		s.potTab = make([]potMemo, potTable)
	}
	if c := &s.potTab[uint64(now/60)%potTable]; !c.ok || c.at != now {
		*c = potMemo{ok: true, at: now, v: s.potential(time.Unix(now, 0))}
	}
	last := x.ValidStart.Add(-time.Duration(x.LeadMinutes)*time.Minute - half).Unix()
	if c := &s.potCache[1]; !c.ok || c.at != last {
		*c = potMemo{ok: true, at: last, v: s.potential(time.Unix(last, 0))}
	}
	return s.potTab[uint64(now/60)%potTable].v, s.potCache[1].v
}

// potTable is the size of the table of step potentials.
const potTable = 256

// potMemo is a potential computed for a Unix time.
type potMemo struct {
	ok bool
	at int64
	v  float64
}

// corrFeatures writes the second layer's features to s.z but the base
// quantile's distance from the median; bm is the base median.
func (s *Stack) corrFeatures(x *Features, u, bm, potNow, potLast float64) {
	s.z[0], s.z[1], s.z[3] = 1, 0, potNow
	if math.IsNaN(x.LastPowerMW) {
		return
	}
	sp := x.LastPowerMW / u
	if s.kind == KindPV && s.hasLoc {
		if potLast < 0.05 {
			return // the sun too low for a clear-sky index
		}
		sp = min(1.2, max(0, sp/potLast)) * potNow
	}
	s.z[1] = sp - bm
}

// sortedFloats reports whether q is non-decreasing (false with a NaN).
func sortedFloats(q []float64) bool {
	for j := 1; j < len(q); j++ {
		if !(q[j-1] <= q[j]) {
			return false
		}
	}
	return true
}

// gridQuantiles writes the corrected, sorted grid quantiles for x to
// s.memo.q (per unit) and returns them.
func (s *Stack) gridQuantiles(x *Features, u float64) []float64 {
	// The answer depends on x only through the base quantiles (the row,
	// or for the Baseline everything), the bucket, the latest reading and
	// the potentials: for a site without a location, steps that share a
	// weather row share the answer.
	potNow, potLast := s.potentials(x)
	m := &s.memo
	baseByRow := s.forest != nil && x.Weather != nil && len(x.WeatherVars) > 0
	if m.ok && m.gen == s.gen && m.bucket == x.Bucket && m.row == x.Weather && m.night == x.Night &&
		m.last == math.Float64bits(x.LastPowerMW) && m.avail == math.Float64bits(u) &&
		m.potNow == potNow && m.potLast == potLast &&
		(baseByRow || (m.start.Equal(x.ValidStart) && m.lead == x.LeadMinutes)) {
		return m.q
	}
	s.baseGrid(x, u)
	bm := interpGrid(s.grid, s.bq, 0.5)
	s.corrFeatures(x, u, bm, potNow, potLast)
	b := min(max(x.Bucket, 0), s.buckets.Len()-1)
	w := s.corrWeights(b)
	z := &s.z
	for k := range s.grid {
		z[2] = s.bq[k] - bm
		// qr.Online.Predict, with the same additions in the same order.
		c := (*[corrDim]float64)(w[k*corrDim:])
		p := 0.0
		for i := range corrDim {
			p += c[i] * z[i]
		}
		m.q[k] = s.bq[k] + p
	}
	if !sortedFloats(m.q) {
		SortNearly(m.q)
	}
	m.potNow, m.potLast = potNow, potLast
	m.ver++
	m.ok, m.gen, m.start, m.lead, m.bucket, m.row, m.night = true, s.gen, x.ValidStart, x.LeadMinutes, x.Bucket, x.Weather, x.Night
	m.last, m.avail = math.Float64bits(x.LastPowerMW), math.Float64bits(u)
	return m.q
}

// corrWeights returns the prediction weights of bucket b's correction
// learners, corrDim for each grid level in turn.
func (s *Stack) corrWeights(b int) []float64 {
	g := len(s.grid)
	if s.cw == nil {
		s.cw = make([]float64, len(s.corr)*corrDim)
		s.cwGen = make([]uint64, s.buckets.Len())
	}
	w := s.cw[b*g*corrDim : (b+1)*g*corrDim]
	if s.cwGen[b] != s.gen+1 {
		for k := range g {
			s.corr[b*g+k].Weights(w[k*corrDim : (k+1)*corrDim])
		}
		s.cwGen[b] = s.gen + 1
	}
	return w
}

// interpGrid reads the quantile at level l off sorted grid quantiles q,
// linearly between grid levels, and towards 0 at level 0 and 1 at level 1
// (per unit: output lies in [0, 1]) beyond them.
func interpGrid(grid, q []float64, l float64) float64 {
	n := len(grid)
	switch {
	case l <= 0:
		return math.Inf(-1)
	case l >= 1:
		return math.Inf(1)
	case l <= grid[0]:
		lo := min(0, q[0])
		return lo + (q[0]-lo)*l/grid[0]
	case l >= grid[n-1]:
		hi := max(1, q[n-1])
		return q[n-1] + (hi-q[n-1])*(l-grid[n-1])/(1-grid[n-1])
	}
	j, _ := slices.BinarySearch(grid, l)
	if grid[j] == l {
		return q[j]
	}
	w := (l - grid[j-1]) / (grid[j] - grid[j-1])
	return q[j-1] + w*(q[j]-q[j-1])
}

// Quantiles implements Forecaster.
func (s *Stack) Quantiles(dst []float64, x *Features, levels []float64) {
	if len(dst) != len(levels) {
		panic("model: Stack.Quantiles: len(dst) != len(levels)")
	}
	u := avail(x)
	if !(u > 0) {
		for j, l := range levels {
			dst[j] = 0
			if l <= 0 || l >= 1 {
				dst[j] = math.Inf(int(math.Copysign(1, l-0.5)))
			}
		}
		return
	}
	q := s.gridQuantiles(x, u)
	o := &s.one
	if o.ok && o.ver == s.memo.ver && o.u == math.Float64bits(u) && SameBits(levels, o.l) {
		copy(dst, o.q)
		return
	}
	s.readGrid(dst, levels, q, u)
	o.ok, o.ver, o.u = true, s.memo.ver, math.Float64bits(u)
	o.l, o.q = append(o.l[:0], levels...), append(o.q[:0], dst...)
}

// QuantilesPair implements PairQuantiler: the corrected grid is found once
// and read at both lists of levels.
func (s *Stack) QuantilesPair(a []float64, la []float64, b []float64, lb []float64, x *Features) {
	if len(a) != len(la) || len(b) != len(lb) {
		panic("model: Stack.QuantilesPair: len(dst) != len(levels)")
	}
	u := avail(x)
	if !(u > 0) {
		s.Quantiles(a, x, la)
		s.Quantiles(b, x, lb)
		return
	}
	q := s.gridQuantiles(x, u)
	p := &s.pair
	if p.ok && p.ver == s.memo.ver && p.u == math.Float64bits(u) && SameBits(la, p.la) && SameBits(lb, p.lb) {
		copy(a, p.qa)
		copy(b, p.qb)
		return
	}
	s.readGrid(a, la, q, u)
	s.readGrid(b, lb, q, u)
	p.ok, p.ver, p.u = true, s.memo.ver, math.Float64bits(u)
	p.la, p.lb = append(p.la[:0], la...), append(p.lb[:0], lb...)
	p.qa, p.qb = append(p.qa[:0], a...), append(p.qb[:0], b...)
}

// readGrid writes to dst the quantiles at levels read off the sorted grid
// quantiles q (per unit), times u: interpGrid with the search resumed from
// the previous level, since the levels asked for are sorted, or nearly
// (calibrated ones).
func (s *Stack) readGrid(dst, levels, q []float64, u float64) {
	if SameBits(levels, s.levels) {
		// The setup's levels, all on the grid.
		for j, k := range s.levelIdx {
			dst[j] = q[k] * u
		}
		return
	}
	// Where each level falls on the grid depends on the levels alone: it
	// is kept for the next call (the calibrated levels of one lead bucket
	// serve every step of the bucket).
	p := &s.plan
	if !SameBits(levels, p.levels) {
		p.build(s.grid, levels)
	}
	g := s.grid
	for j, l := range levels {
		switch k := p.k[j]; {
		case k < 0:
			dst[j] = interpGrid(g, q, l) * u
		case p.on[j]:
			dst[j] = q[k] * u
		default:
			w := p.w[j]
			dst[j] = (q[k-1] + w*(q[k]-q[k-1])) * u
		}
	}
}

// stackPair is the last QuantilesPair answer of a Stack.
type stackPair struct {
	ok             bool
	ver, u         uint64
	la, lb, qa, qb []float64
}

// stackOne is the last Quantiles answer of a Stack.
type stackOne struct {
	ok     bool
	ver, u uint64
	l, q   []float64
}

// gridPlan says where levels fall on a grid: level j lies on grid[k[j]]
// (on[j]), or between grid[k[j]-1] and grid[k[j]] at weight w[j], or, k[j]
// < 0, outside (grid[0], grid[len-1]).
type gridPlan struct {
	levels []float64
	k      []int
	w      []float64
	on     []bool
}

func (p *gridPlan) build(g, levels []float64) {
	p.levels = append(p.levels[:0], levels...)
	p.k, p.w, p.on = p.k[:0], p.w[:0], p.on[:0]
	for _, l := range levels {
		if !(l > g[0] && l < g[len(g)-1]) {
			p.k, p.w, p.on = append(p.k, -1), append(p.w, 0), append(p.on, false)
			continue
		}
		k, found := slices.BinarySearch(g, l)
		w := 0.0
		if !found {
			w = (l - g[k-1]) / (g[k] - g[k-1])
		}
		p.k, p.w, p.on = append(p.k, k), append(p.w, w), append(p.on, found)
	}
}

// Learn implements Forecaster.
func (s *Stack) Learn(y float64, xs []*Features) {
	defer func() { s.gen++ }()
	s.base.Learn(y, xs)
	if len(xs) == 0 || math.IsNaN(y) {
		return
	}
	s.install()
	u0 := avail(xs[0])
	if !(u0 > 0) {
		return
	}
	if s.curve != nil {
		if v := s.windSpeed(xs[0].Weather, xs[0].WeatherVars, xs[0].Driver); !math.IsNaN(v) {
			s.curve.Add(v, y/u0)
		}
	}
	g := len(s.grid)
	for _, x := range xs {
		u := avail(x)
		if x.Night || !(u > 0) {
			continue
		}
		pu := y / u
		s.baseGrid(x, u)
		bm := interpGrid(s.grid, s.bq, 0.5)
		potNow, potLast := s.potentials(x)
		s.corrFeatures(x, u, bm, potNow, potLast)
		b := min(max(x.Bucket, 0), s.buckets.Len()-1)
		for k := range s.grid {
			s.z[2] = s.bq[k] - bm
			s.corr[b*g+k].Update(s.z[:], pu-s.bq[k])
		}
	}
	if x := xs[0]; !x.Night && x.Weather != nil && len(x.WeatherVars) > 0 {
		s.addRow(x, y/u0)
		s.maybeRefit()
	}
}

// addRow appends the forest features of x's weather row and the per-unit
// outcome to the training ring.
func (s *Stack) addRow(x *Features, pu float64) {
	s.features(x.Weather, x.WeatherVars, x.Driver, s.curve)
	if s.trX == nil {
		s.trX = make([]float64, 0, 1024*s.p)
	}
	if c := s.ringRows(); s.trTotal < c {
		s.trX = append(s.trX, s.fx...)
		s.trY = append(s.trY, pu)
	} else {
		k := s.trTotal % c
		copy(s.trX[k*s.p:], s.fx)
		s.trY[k] = pu
	}
	s.trTotal++
	s.added++
}

// maybeRefit starts growing a new forest when the history allows and
// calls for one.
func (s *Stack) maybeRefit() {
	n := min(s.trTotal, s.o.MaxRows)
	if s.fitCh != nil || n < s.o.MinRows {
		return
	}
	if s.lastN > 0 && s.added < min(s.o.RefitRows, int(s.o.RefitGrowth*float64(s.lastN))) {
		return
	}
	s.launch(fitLaunch{at: s.trTotal, n: n}, 0)
	s.lastN, s.added = n, 0
}

// launch starts growing, on its own goroutine, the forest of the rows l
// records, age settlements into its wait for installation.
func (s *Stack) launch(l fitLaunch, age int) {
	X, y := s.fitRows(l)
	p, o := s.p, s.o
	ch := make(chan fitResult, 1) // the goroutine never blocks, even if the Stack is dropped
	go func() {
		f, err := grow(X, p, y, o)
		ch <- fitResult{f, err}
	}()
	s.fitCh, s.flight, s.fitAge = ch, l, age
}

// install puts a finished forest in use InstallAfter settlements after
// its fit started.
func (s *Stack) install() {
	if s.fitCh == nil {
		return
	}
	s.fitAge++
	if s.fitAge < s.o.InstallAfter {
		return
	}
	r := <-s.fitCh
	s.fitCh = nil
	if r.err != nil {
		s.fitErr = r.err
		return
	}
	s.forest, s.inst = r.f, s.flight
	if s.curve != nil {
		s.fcurve = cloneCurve(s.curve)
	}
	s.fits++
	clear(s.cache)
	s.slab = s.slab[:0]
}

// cloneCurve returns a copy of c.
func cloneCurve(c *wind.Curve) *wind.Curve {
	b, err := c.MarshalBinary()
	d := &wind.Curve{}
	if err == nil {
		err = d.UnmarshalBinary(b)
	}
	if err != nil {
		panic("model: copying a wind curve: " + err.Error()) // a curve always encodes and decodes
	}
	return d
}
