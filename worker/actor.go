// Package worker holds the site actor, which owns one site's forecasting
// state, and the pool that routes decoded inputs to actors and publishes
// what they produce.
//
// # Event time
//
// An actor never reads the wall clock. Its "now" is the end of the latest
// meter interval it has seen, or the issue time of the latest weather run if
// that is later (so a meter gap does not freeze the forecast); a reading or a
// run is judged late, duplicate or absurd against that. The same inputs in
// the same order give the same bundles, byte for byte.
package worker

import (
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"sort"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/solar"
)

// Sentinel errors an actor returns for inputs it refuses; the pool turns
// them into rejects.
var (
	// ErrDuplicate: the reading's interval, or the run's (issue time, source),
	// was already applied.
	ErrDuplicate = errors.New("duplicate")
	// ErrTooLate: the reading ends before now minus the lateness window, or
	// the run is older than every run kept.
	ErrTooLate = errors.New("too late")
	// ErrTooFarAhead: the input lies further ahead of the site's now than
	// Config.MaxAhead.
	ErrTooFarAhead = errors.New("too far ahead of the site's event time")
)

// Config configures every site actor of a worker. Zero fields take the
// documented defaults.
type Config struct {
	// Levels are the quantile levels of the bundle; nil means model.DefaultLevels.
	Levels []float64
	// Buckets pool lead times for calibration and coverage; zero value means
	// model.DefaultBuckets.
	Buckets model.Buckets
	// HorizonMinutes is how far ahead a bundle reaches; 0 means to the end of
	// the next UTC day, and at least 36 h.
	HorizonMinutes int
	// StepMinutes is the length of a bundle step; 0 means the latest meter
	// interval, else the weather run's valid interval, else 15 minutes.
	StepMinutes int
	// Lateness is how far behind the site's now a reading may still be
	// applied; 0 means 6 h.
	Lateness time.Duration
	// MaxAhead is how far ahead of the site's now an input may lie; 0 means 30 days.
	MaxAhead time.Duration
	// KeepRuns is how many weather runs an actor keeps; 0 means 4.
	KeepRuns int
	// CoverageWindow is the number of settled forecasts per (lead bucket,
	// level) over which rolling coverage is judged; 0 means 672 (a week of
	// 15-minute intervals).
	CoverageWindow int
	// Calibrator chooses and tunes the online calibrator.
	Calibrator conformal.Options
	// Alarm tunes the coverage alarm; MinSamples 0 means half the
	// CoverageWindow.
	Alarm conformal.AlarmOptions
	// NewForecaster makes a site's forecaster; nil means model.NewBaseline.
	NewForecaster func(model.Site) model.Forecaster
}

// WithDefaults returns c with every zero field set to its default.
func (c Config) WithDefaults() Config {
	if len(c.Levels) == 0 {
		c.Levels = model.DefaultLevels()
	}
	if c.Buckets.Len() == 0 {
		c.Buckets = model.DefaultBuckets()
	}
	if c.Lateness <= 0 {
		c.Lateness = 6 * time.Hour
	}
	if c.MaxAhead <= 0 {
		c.MaxAhead = 30 * 24 * time.Hour
	}
	if c.KeepRuns <= 0 {
		c.KeepRuns = 4
	}
	if c.CoverageWindow <= 0 {
		c.CoverageWindow = 672
	}
	if c.Alarm.MinSamples == 0 {
		// No judgement before the window is half full: a model warming up
		// is not a drift.
		c.Alarm.MinSamples = c.CoverageWindow / 2
	}
	if c.NewForecaster == nil {
		b := c.Buckets
		c.NewForecaster = func(s model.Site) model.Forecaster {
			return model.NewBaseline(s.Kind, model.BaselineOptions{Buckets: b})
		}
	}
	return c
}

// run is a weather run kept by an actor, with the indices of the variables
// the features need.
type run struct {
	*model.WeatherRun
	driver, u, v int
}

// pending is one issued forecast awaiting its outcome: the latest one issued
// for a target interval in a lead bucket.
type pending struct {
	x   model.Features
	raw []float64 // raw quantiles at the nominal levels
	cal []float64 // calibrated quantiles, before sorting and clipping
}

type target struct {
	minutes  int
	byBucket []*pending
}

// cell holds the calibration and coverage state of one (lead bucket, level).
type cell struct {
	cal     conformal.Calibrator
	mon     *conformal.Monitor
	settled int // forecasts settled so far
	hits    int // outcomes at or below the published quantile
	rawHits int // outcomes at or below the raw quantile
}

// Actor owns one site's state: weather runs in force, pending forecasts,
// forecaster, calibrators and coverage monitors. It is not safe for
// concurrent use: the pool gives each actor to one goroutine.
type Actor struct {
	site model.Site
	cfg  Config
	fc   model.Forecaster

	runs []run // sorted by IssuedAt, at most cfg.KeepRuns

	now          time.Time // event-time now
	lastMeterEnd time.Time
	firstMeter   time.Time
	lit          [96]time.Time // PV: when each quarter-hour of the day last showed output
	lastPower    float64
	availability float64
	stepMinutes  int

	seen    map[int64]struct{} // interval starts (unix minutes) already applied
	night   map[int64]bool     // PV: is the interval starting then at night (a cache)
	pending map[int64]*target  // by target interval start (unix minutes)
	free    []*pending

	cells  []cell // [bucket*len(levels)+level]
	events []conformal.Event

	siteHash uint64 // seeds tieBreak

	// scratch
	adj, tmp, pub []float64
	learn         []*model.Features
}

// NewActor returns an actor for site; cfg must already have its defaults
// (Config.WithDefaults).
func NewActor(site model.Site, cfg Config) (*Actor, error) {
	a := &Actor{
		site:         site,
		cfg:          cfg,
		fc:           cfg.NewForecaster(site),
		lastPower:    math.NaN(),
		availability: 1,
		seen:         make(map[int64]struct{}),
		night:        make(map[int64]bool),
		pending:      make(map[int64]*target),
	}
	nl := len(cfg.Levels)
	a.cells = make([]cell, cfg.Buckets.Len()*nl)
	for i := range a.cells {
		lvl := cfg.Levels[i%nl]
		c, err := conformal.New(lvl, cfg.Calibrator)
		if err != nil {
			return nil, fmt.Errorf("worker: site %s: %w", site.ID, err)
		}
		mon, err := conformal.NewMonitor(lvl, conformal.MonitorOptions{Window: cfg.CoverageWindow, Alarm: cfg.Alarm})
		if err != nil {
			return nil, fmt.Errorf("worker: site %s: %w", site.ID, err)
		}
		a.cells[i] = cell{cal: c, mon: mon}
	}
	h := fnv.New64a()
	h.Write([]byte(site.ID))
	a.siteHash = h.Sum64()
	a.adj = make([]float64, nl)
	a.tmp = make([]float64, nl)
	a.pub = make([]float64, nl)
	return a, nil
}

// Site returns the actor's site.
func (a *Actor) Site() model.Site { return a.site }

// Now returns the actor's event-time now (zero before any input).
func (a *Actor) Now() time.Time { return a.now }

func unixMin(t time.Time) int64 { return t.Unix() / 60 }

// Weather applies a weather run. It returns ErrDuplicate for a run already
// kept, ErrTooLate for a run older than every run kept when the store is
// full, and ErrTooFarAhead for a run issued absurdly far ahead of now.
func (a *Actor) Weather(w *model.WeatherRun) error {
	if !a.now.IsZero() && w.IssuedAt.Sub(a.now) > a.cfg.MaxAhead {
		return fmt.Errorf("%w: run issued %s, site now %s", ErrTooFarAhead, w.IssuedAt.Format(time.RFC3339), a.now.Format(time.RFC3339))
	}
	for _, r := range a.runs {
		if r.IssuedAt.Equal(w.IssuedAt) && r.Source == w.Source {
			return fmt.Errorf("%w: run issued %s (source %q) already applied", ErrDuplicate, w.IssuedAt.Format(time.RFC3339), w.Source)
		}
	}
	if len(a.runs) >= a.cfg.KeepRuns && w.IssuedAt.Before(a.runs[0].IssuedAt) {
		return fmt.Errorf("%w: run issued %s is older than the %d runs kept", ErrTooLate, w.IssuedAt.Format(time.RFC3339), len(a.runs))
	}
	r := run{WeatherRun: w, driver: -1, u: -1, v: -1}
	if a.site.Kind == model.KindPV {
		r.driver = w.Var("ghi_wm2")
	} else {
		r.driver = w.Var("wind_ms")
		for _, uv := range [][2]string{{"u_ms", "v_ms"}, {"u100_ms", "v100_ms"}, {"u10_ms", "v10_ms"}} {
			if r.u, r.v = w.Var(uv[0]), w.Var(uv[1]); r.u >= 0 && r.v >= 0 {
				break
			}
		}
	}
	i := sort.Search(len(a.runs), func(i int) bool { return a.runs[i].IssuedAt.After(w.IssuedAt) })
	a.runs = append(a.runs, run{})
	copy(a.runs[i+1:], a.runs[i:])
	a.runs[i] = r
	if len(a.runs) > a.cfg.KeepRuns {
		a.runs = a.runs[len(a.runs)-a.cfg.KeepRuns:]
	}
	if a.stepMinutes == 0 && a.cfg.StepMinutes == 0 && len(w.Rows) > 0 {
		a.stepMinutes = w.Rows[0].ValidMinutes
	}
	a.advance(w.IssuedAt)
	return nil
}

// Meter applies a meter reading: it settles the forecasts pending for the
// reading's interval, feeding the forecaster, the calibrators and the
// coverage monitors, and moves now forward. Alarm transitions are queued for
// Events.
func (a *Actor) Meter(r *model.Reading) error {
	end := r.End()
	if !a.now.IsZero() {
		if end.Sub(a.now) > a.cfg.MaxAhead {
			return fmt.Errorf("%w: reading ends %s, site now %s", ErrTooFarAhead, end.Format(time.RFC3339), a.now.Format(time.RFC3339))
		}
		if a.now.Sub(end) > a.cfg.Lateness {
			return fmt.Errorf("%w: reading ends %s, more than %s before the site's now %s", ErrTooLate, end.Format(time.RFC3339), a.cfg.Lateness, a.now.Format(time.RFC3339))
		}
	}
	key := unixMin(r.IntervalStart)
	if _, dup := a.seen[key]; dup {
		return fmt.Errorf("%w: interval %s already applied", ErrDuplicate, r.IntervalStart.Format(time.RFC3339))
	}
	a.seen[key] = struct{}{}
	if a.site.Kind == model.KindPV && !math.IsNaN(r.PowerMW) {
		if a.firstMeter.IsZero() {
			a.firstMeter = r.IntervalStart
		}
		if r.PowerMW > 0.005*a.site.CapacityMW {
			// Every quarter-hour the reading spans saw light.
			for m := 0; m < r.IntervalMinutes; m += 15 {
				a.lit[slotOf(r.IntervalStart.Add(time.Duration(m)*time.Minute))] = end
			}
		}
	}
	if end.After(a.lastMeterEnd) {
		a.lastMeterEnd = end
		a.lastPower = r.PowerMW
		a.availability = r.Availability
		if a.cfg.StepMinutes == 0 {
			a.stepMinutes = r.IntervalMinutes
		}
	}
	if t, ok := a.pending[key]; ok && t.minutes == r.IntervalMinutes {
		a.settle(t, r, end)
		delete(a.pending, key)
	}
	a.advance(end)
	return nil
}

// advance moves now forward to t (never back) and forgets what the lateness
// window no longer needs.
func (a *Actor) advance(t time.Time) {
	if !t.After(a.now) {
		return
	}
	a.now = t
	horizon := unixMin(a.now.Add(-a.cfg.Lateness))
	for k, tg := range a.pending {
		if k+int64(tg.minutes) < horizon {
			a.release(tg)
			delete(a.pending, k)
		}
	}
	for k := range a.seen {
		if k < horizon-24*60 {
			delete(a.seen, k)
		}
	}
	for k := range a.night {
		if k < horizon {
			delete(a.night, k)
		}
	}
}

func (a *Actor) release(tg *target) {
	for b, p := range tg.byBucket {
		if p != nil {
			a.free = append(a.free, p)
			tg.byBucket[b] = nil
		}
	}
}

// settle scores every forecast pending for the reading's interval, then
// lets the forecaster learn from it once.
func (a *Actor) settle(tg *target, r *model.Reading, at time.Time) {
	nl := len(a.cfg.Levels)
	y := r.PowerMW
	a.learn = a.learn[:0]
	for b, p := range tg.byBucket {
		if p == nil || p.x.Night || r.Curtailed {
			continue
		}
		pit := pitOf(a.cfg.Levels, p.raw, y)
		copy(a.pub, p.cal)
		a.publishable(a.pub, &p.x)
		u := conformal.TieDraw(a.siteHash, r.IntervalStart, b)
		for j := 0; j < nl; j++ {
			c := &a.cells[b*nl+j]
			hit := conformal.TieHit(a.cfg.Levels, a.pub, j, y, u)
			// The calibrator learns from the published quantile as
			// judged, ties at a point mass included.
			issued := a.pub[j]
			if y == issued && !hit {
				issued = math.Nextafter(y, math.Inf(-1))
			}
			c.cal.Update(conformal.Outcome{Y: y, Issued: issued, PIT: pit})
			rawHit := pit <= a.cfg.Levels[j]
			c.mon.Record(hit, true, rawHit)
			c.settled++
			if hit {
				c.hits++
			}
			if rawHit {
				c.rawHits++
			}
			a.checkAlarm(c, b, j, at)
		}
		a.learn = append(a.learn, &p.x)
	}
	if len(a.learn) > 0 {
		a.fc.Learn(y, a.learn) // buckets ascend: shortest lead first
	}
	a.release(tg)
}

func (a *Actor) checkAlarm(c *cell, b, j int, at time.Time) {
	if changed, _ := c.mon.Check(); changed {
		a.events = append(a.events, c.mon.Event(a.site.ID, a.cfg.Buckets.Name(b), at))
	}
}

// Events returns the alarm transitions queued since the last call and
// clears the queue. The returned slice is the caller's.
func (a *Actor) Events() []conformal.Event {
	if len(a.events) == 0 {
		return nil
	}
	ev := a.events
	a.events = nil
	return ev
}

// pitOf interpolates the raw forecast's cumulative probability at y on its
// grid of levels (0 or 1 outside the grid's span).
func pitOf(levels, q []float64, y float64) float64 {
	n := len(levels)
	if n == 0 || math.IsNaN(y) {
		return math.NaN()
	}
	if y < q[0] {
		return 0
	}
	if y >= q[n-1] {
		return 1
	}
	for j := 1; j < n; j++ {
		if y < q[j] {
			w := (y - q[j-1]) / (q[j] - q[j-1])
			return levels[j-1] + w*(levels[j]-levels[j-1])
		}
	}
	return 1
}

// publishable turns calibrated quantiles into the published ones in place:
// sorted (rearrangement, METHODS.md section 3), clipped to [0, available
// capacity], zero at night for PV.
func (a *Actor) publishable(q []float64, x *model.Features) {
	if x.Night {
		for j := range q {
			q[j] = 0
		}
		return
	}
	sort.Float64s(q)
	hi := x.CapacityMW * x.Availability
	for j, v := range q {
		q[j] = math.Max(0, math.Min(hi, v))
	}
}

func (a *Actor) step() int {
	switch {
	case a.cfg.StepMinutes > 0:
		return a.cfg.StepMinutes
	case a.stepMinutes > 0:
		return a.stepMinutes
	}
	return 15
}

// horizonEnd returns the end of the bundle that starts at from.
func (a *Actor) horizonEnd(from time.Time) time.Time {
	if a.cfg.HorizonMinutes > 0 {
		return from.Add(time.Duration(a.cfg.HorizonMinutes) * time.Minute)
	}
	y, m, d := from.UTC().Date()
	endNextDay := time.Date(y, m, d+2, 0, 0, 0, 0, time.UTC)
	if min36 := from.Add(36 * time.Hour); endNextDay.Before(min36) {
		return min36
	}
	return endNextDay
}

// features builds what the forecaster knows about the interval [t, t+step).
func (a *Actor) features(x *model.Features, t time.Time, step int) {
	*x = model.Features{
		ValidStart:    t,
		ValidMinutes:  step,
		LeadMinutes:   int(t.Sub(a.now) / time.Minute),
		CapacityMW:    a.site.CapacityMW,
		Availability:  a.availability,
		Driver:        math.NaN(),
		RunAgeMinutes: math.NaN(),
		LastPowerMW:   a.lastPower,
	}
	x.Bucket = a.cfg.Buckets.Of(x.LeadMinutes)
	mid := t.Add(time.Duration(step) * time.Minute / 2)
	x.HourUTC = float64(mid.Hour()) + float64(mid.Minute())/60
	for i := len(a.runs) - 1; i >= 0; i-- {
		r := &a.runs[i]
		if r.IssuedAt.After(a.now) {
			continue
		}
		row := r.At(t)
		if row == nil {
			continue
		}
		x.RunAgeMinutes = a.now.Sub(r.IssuedAt).Minutes()
		switch {
		case r.driver >= 0 && !math.IsNaN(row.Values[r.driver]):
			x.Driver = row.Values[r.driver]
		case r.u >= 0:
			x.Driver = math.Hypot(row.Values[r.u], row.Values[r.v])
		}
		break
	}
	if a.site.Kind == model.KindPV {
		if a.site.HasLocation() {
			lat, lon := *a.site.Lat, *a.site.Lon
			end := t.Add(time.Duration(step) * time.Minute)
			key := unixMin(t)
			night, ok := a.night[key]
			if !ok {
				night = sunDown(t, lat, lon) && sunDown(mid, lat, lon) && sunDown(end, lat, lon)
				a.night[key] = night
			}
			x.Night = night
		} else if !math.IsNaN(x.Driver) {
			x.Night = x.Driver <= 0 // no location: trust the forecast irradiance
		} else {
			x.Night = a.darkSlot(t) // neither: what the meter has shown
		}
	}
}

// darkSlots is how long a quarter-hour of the day must have shown no output,
// on every day with a reading, before a PV site without location or
// irradiance forecast counts it as night.
const darkSlots = 14 * 24 * time.Hour

// darkSlot reports whether the quarter-hour of the day of t has shown no
// output for darkSlots while the site was observed that long.
func (a *Actor) darkSlot(t time.Time) bool {
	if a.firstMeter.IsZero() || a.now.Sub(a.firstMeter) < darkSlots {
		return false
	}
	lit := a.lit[slotOf(t)]
	return lit.IsZero() || a.now.Sub(lit) > darkSlots
}

// slotOf returns the quarter-hour of the day of t (UTC).
func slotOf(t time.Time) int {
	t = t.UTC()
	return (t.Hour()*60 + t.Minute()) / 15
}

// sunDown reports whether the sun is more than a degree below the horizon.
func sunDown(t time.Time, lat, lon float64) bool {
	zenith, _ := solar.Position(t, lat, lon)
	return zenith > 91
}

// Refresh issues a new bundle from the site's current state: for each step
// from now to the horizon, raw quantiles from the forecaster, the
// calibrators' adjustment, sorting and clipping. Every issued step becomes
// the pending forecast of its (interval, lead bucket). It returns nil before
// the actor has seen any input.
func (a *Actor) Refresh() *model.Bundle {
	if a.now.IsZero() {
		return nil
	}
	step := a.step()
	stepDur := time.Duration(step) * time.Minute
	start := a.now.Truncate(stepDur)
	end := a.horizonEnd(a.now)
	n := int((end.Sub(start) + stepDur - 1) / stepDur)
	nl := len(a.cfg.Levels)
	b := &model.Bundle{
		Site:         a.site.ID,
		IssuedAt:     a.now,
		Watermark:    a.now,
		Model:        a.fc.Name(),
		CapacityMW:   a.site.CapacityMW,
		Availability: a.availability,
		Levels:       a.cfg.Levels,
		Steps:        make([]model.Step, n),
		Q:            make([]float64, n*nl),
		Expected:     make([]float64, n),
	}
	if len(a.cells) > 0 {
		b.Calibrator = a.cells[0].cal.Name()
	}
	for i := len(a.runs) - 1; i >= 0; i-- {
		if !a.runs[i].IssuedAt.After(a.now) {
			b.WeatherIssuedAt = a.runs[i].IssuedAt
			break
		}
	}
	var x model.Features
	for i := 0; i < n; i++ {
		t := start.Add(time.Duration(i) * stepDur)
		a.features(&x, t, step)
		b.Steps[i] = model.Step{ValidStart: t, ValidMinutes: step, LeadMinutes: x.LeadMinutes}
		p := a.pendingFor(t, step, x.Bucket)
		p.x = x
		a.fc.Quantiles(p.raw, &x, a.cfg.Levels)
		for j := 0; j < nl; j++ {
			a.adj[j], a.tmp[j] = a.cells[x.Bucket*nl+j].cal.Adjust()
		}
		a.fc.Quantiles(p.cal, &x, a.adj)
		for j := 0; j < nl; j++ {
			p.cal[j] += a.tmp[j]
		}
		row := b.Row(i)
		copy(row, p.cal)
		a.publishable(row, &x)
		sum := 0.0
		for _, v := range row {
			sum += v
		}
		b.Expected[i] = sum / float64(nl)
	}
	return b
}

// pendingFor returns the pending record of (interval t, bucket), reusing a
// free one.
func (a *Actor) pendingFor(t time.Time, step, bucket int) *pending {
	key := unixMin(t)
	tg, ok := a.pending[key]
	if !ok || tg.minutes != step {
		if ok {
			a.release(tg)
		} else {
			tg = &target{byBucket: make([]*pending, a.cfg.Buckets.Len())}
			a.pending[key] = tg
		}
		tg.minutes = step
	}
	p := tg.byBucket[bucket]
	if p == nil {
		if k := len(a.free); k > 0 {
			p = a.free[k-1]
			a.free = a.free[:k-1]
		} else {
			nl := len(a.cfg.Levels)
			p = &pending{raw: make([]float64, nl), cal: make([]float64, nl)}
		}
		tg.byBucket[bucket] = p
	}
	return p
}

// LevelStats is the cumulative coverage of one level over every lead bucket.
type LevelStats struct {
	Level    float64
	Settled  int
	Coverage float64 // share of outcomes at or below the published quantile
	Raw      float64 // the same for the raw model's quantile
}

// Stats returns the cumulative coverage of each level, pooled over lead buckets.
func (a *Actor) Stats() []LevelStats {
	nl := len(a.cfg.Levels)
	out := make([]LevelStats, nl)
	for j := range out {
		out[j].Level = a.cfg.Levels[j]
		var hits, raw int
		for b := 0; b < a.cfg.Buckets.Len(); b++ {
			c := &a.cells[b*nl+j]
			out[j].Settled += c.settled
			hits += c.hits
			raw += c.rawHits
		}
		if out[j].Settled > 0 {
			out[j].Coverage = float64(hits) / float64(out[j].Settled)
			out[j].Raw = float64(raw) / float64(out[j].Settled)
		}
	}
	return out
}

// ActiveAlarms returns how many (lead bucket, level) coverage alarms are raised.
func (a *Actor) ActiveAlarms() int {
	n := 0
	for i := range a.cells {
		if a.cells[i].mon.Alarm.Raised() {
			n++
		}
	}
	return n
}
