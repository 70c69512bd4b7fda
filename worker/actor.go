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
	"slices"
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
	// Reorder, if positive, is a window of event time over which inputs
	// are put back in order: each input is held until an input at least
	// Reorder later in event time (issue time of a run, end of a reading)
	// has come, and applied then in event-time order. Inputs shuffled
	// within the window then leave a site exactly as inputs in order do,
	// at the price of bundles that follow the inputs by the window. 0 (the
	// default) applies every input on arrival. At most Lateness.
	Reorder time.Duration
	// KeepRuns is how many weather runs an actor keeps; 0 means 4.
	KeepRuns int
	// CoverageWindow is the number of settled forecasts per (lead bucket,
	// level) over which rolling coverage is judged; 0 means 672 (a week of
	// 15-minute intervals).
	CoverageWindow int
	// Calibrator chooses and tunes the online calibrator.
	Calibrator conformal.Options
	// Alarm tunes the coverage_off alarm of every (lead bucket, level);
	// RawAlarm the raw_drift one. The zero values are the defaults of
	// conformal.AlarmOptions.
	Alarm, RawAlarm conformal.AlarmOptions
	// MeterFlat raises meter_flat when a site's meter has read one value
	// between 1 % and 95 % of capacity for this long of event time (a stuck
	// meter or a frozen feed; see KindMeterFlat); 0 means
	// DefaultMeterFlat, negative turns the check off.
	MeterFlat time.Duration
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
	if c.MeterFlat == 0 {
		c.MeterFlat = DefaultMeterFlat
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

// runCursor is where a refresh stands in a run's rows: how many start at or
// before the current step, and the end of the last of them.
type runCursor struct {
	rows int
	end  time.Time
	age  float64 // now.Sub(IssuedAt).Minutes(), NaN until computed
}

// A pending forecast is one issued forecast awaiting its outcome: the
// latest one issued for a target interval in a lead bucket. Settlement
// needs its features (for the forecaster to learn from, and the night
// flag), its raw quantiles at the nominal levels (for the raw coverage) and
// its published quantiles (for the calibrators and the coverage). They are
// kept in the actor's record store, by record number: the features in
// pendingX, the quantiles side by side in a float64 slab, which holds no
// pointer and pays no allocation header per record.

// pendingX is what settlement needs of a pending forecast's features beyond
// what its target and lead bucket tell: ValidMinutes is the target's
// minutes, Bucket the bucket, CapacityMW the site's, HourUTC follows from
// ValidStart and ValidMinutes (see expand).
type pendingX struct {
	validStart                       time.Time
	lead                             int
	issued                           int32 // forecasts issued for the interval in the bucket so far
	settledAt                        int32 // the bucket's settlements at issue (conformal.Outcome.Lag); -1 unknown
	avail, driver, runAge, lastPower float64
	night                            bool
	row                              *model.WeatherRow // Features.Weather
	run                              *model.WeatherRun // its run, for Features.WeatherVars
}

// recChunk is how many pending records a chunk of the record store holds.
const recChunk = 32

// noRec marks a lead bucket without a pending forecast in a target.
const noRec = -1

// target holds the pending forecasts of one interval, by lead bucket.
type target struct {
	minutes int
	rec     []int32 // record number by lead bucket, or noRec
}

// cell holds the calibration and coverage state of one (lead bucket, level).
type cell struct {
	cal     conformal.Calibrator
	corr    conformal.Corrector // cal, if it tells its correction; else nil
	mon     *conformal.Monitor
	settled int // forecasts settled so far
	hits    int // outcomes at or below the published quantile
	rawHits int // outcomes at or below the raw quantile
	// The calibrator's correction (the level it asks for, the offset it
	// adds) averaged over about a day of settlements (half-life
	// corrHalfLife): the correction now less this is its trend.
	corrLevel, corrOffset float64
}

// corrHalfLife is the half-life, in settlements, of a cell's mean
// correction: a day of 15-minute intervals.
const corrHalfLife = 96

// corrWeight is the weight of the newest correction in that mean.
var corrWeight = -math.Expm1(-math.Ln2 / corrHalfLife)

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

	// By interval start (unix minutes), sorted:
	seen    keyed[struct{}] // intervals already applied
	night   keyed[bool]     // PV: is the interval at night (a cache)
	pending keyed[*target]  // forecasts awaiting their outcome
	freeT   []*target       // targets no longer pending

	// The pending records, by record number r: recX[r/recChunk][r%recChunk],
	// the raw quantiles at recRaw[r/recChunk] and the published ones at
	// recPub[r/recChunk], from (r%recChunk)*len(levels). The raw ones are
	// float32: they only feed the raw PIT (the raw monitor, dtaci's
	// experts), where 1e-7 of a quantile is nothing, and a site holds
	// hundreds of pending records. The published ones stay float64: each
	// calibrator is judged on exactly what was published.
	recX    [][]pendingX
	recRaw  [][]float32
	recPub  [][]float64
	nrec    int32   // records made
	freeRec []int32 // records no longer in use
	// A record for a step whose pending forecast stays (closerLead).
	spareX   pendingX
	xRun     *model.WeatherRun // the run of a.x.Weather (features sets both)
	spareRaw []float32
	sparePub []float64
	rawQ     []float64 // refresh: the raw quantiles of a step, before they are kept
	rawCut   []float64 // settle: a pending forecast's raw quantiles, clipped

	cells  []cell // [bucket*len(levels)+level]
	events []conformal.Event
	// issuedMean is, per lead bucket, the running mean of the forecasts
	// issued per settled interval (the last issuedWindow settlements); 0
	// before the first (or after a restore of a snapshot older than
	// version 6). See issueWeight.
	issuedMean []float64
	// flat follows the run of equal meter readings (meter_flat).
	flat flatMeter

	// The reorder window (Config.Reorder): inputs held, in order, and the
	// latest event time held or seen.
	prePub []float64        // scratch of RefreshInto
	prepX  []model.Features // scratch of Weather

	held     []heldInput
	heldMax  time.Time
	released []heldInput // scratch of hold

	siteHash uint64 // seeds tieBreak

	// bundle is what Refresh returns, its slices reused from call to call
	// (left empty if only RefreshInto is used).
	bundle model.Bundle

	// Calibrators' adjustments, asked once per lead bucket per refresh:
	// adjLevel and adjOffset [bucket*len(levels)+k] are valid for bucket
	// when adjGen[bucket] == gen, in the order of their levels; adjRank
	// [bucket*len(levels)+j] is where calibrator j's pair is in that order.
	adjLevel, adjOffset []float64
	adjRank             []int32
	adjOrder            []int32 // scratch of adjustments
	adjGen              []uint64
	adjZero             []bool // every offset of the bucket is zero
	gen                 uint64

	// scratch
	cursor  []runCursor      // per kept run (Refresh)
	nightAt int              // index in night of the next step's key (Refresh)
	pendAt  int              // index in pending of the next step's key (Refresh)
	x       model.Features   // the step's features (Refresh); a field, as &x escapes
	learnX  []model.Features // by lead bucket: the features settle hands to Learn
	learn   []*model.Features
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
	}
	if a.cfg.MeterFlat == 0 {
		a.cfg.MeterFlat = DefaultMeterFlat
	}
	nl := len(cfg.Levels)
	a.cells = make([]cell, cfg.Buckets.Len()*nl)
	a.issuedMean = make([]float64, cfg.Buckets.Len())
	for i := range a.cells {
		lvl := cfg.Levels[i%nl]
		c, err := conformal.New(lvl, cfg.Calibrator)
		if err != nil {
			return nil, fmt.Errorf("worker: site %s: %w", site.ID, err)
		}
		mon, err := conformal.NewMonitor(lvl, conformal.MonitorOptions{Window: cfg.CoverageWindow, Alarm: cfg.Alarm, RawAlarm: cfg.RawAlarm})
		if err != nil {
			return nil, fmt.Errorf("worker: site %s: %w", site.ID, err)
		}
		corr, _ := c.(conformal.Corrector)
		a.cells[i] = cell{cal: c, corr: corr, mon: mon}
	}
	h := fnv.New64a()
	h.Write([]byte(site.ID))
	a.siteHash = h.Sum64()
	a.spareRaw = make([]float32, len(cfg.Levels))
	a.sparePub = make([]float64, len(cfg.Levels))
	a.rawQ = make([]float64, len(cfg.Levels))
	a.rawCut = make([]float64, len(cfg.Levels))
	a.adjLevel = make([]float64, len(a.cells))
	a.adjOffset = make([]float64, len(a.cells))
	a.adjRank = make([]int32, len(a.cells))
	a.adjOrder = make([]int32, len(cfg.Levels))
	a.adjGen = make([]uint64, cfg.Buckets.Len())
	a.adjZero = make([]bool, cfg.Buckets.Len())
	a.cursor = make([]runCursor, 0, cfg.KeepRuns+1)
	a.learnX = make([]model.Features, cfg.Buckets.Len())
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
	r := a.keptRun(w)
	i := sort.Search(len(a.runs), func(i int) bool { return a.runs[i].IssuedAt.After(w.IssuedAt) })
	a.runs = append(a.runs, run{})
	copy(a.runs[i+1:], a.runs[i:])
	a.runs[i] = r
	if drop := len(a.runs) - a.cfg.KeepRuns; drop > 0 {
		// Shift down rather than reslice, so the slice keeps its room and
		// the next append does not allocate.
		n := copy(a.runs, a.runs[drop:])
		clear(a.runs[n:])
		a.runs = a.runs[:n]
	}
	if a.stepMinutes == 0 && a.cfg.StepMinutes == 0 && len(w.Rows) > 0 {
		a.stepMinutes = w.Rows[0].ValidMinutes
	}
	a.advance(w.IssuedAt)
	return nil
}

// driverOf returns the driving variable of one of r's rows: forecast
// irradiance (PV) or wind speed, NaN if missing.
func (r *run) driverOf(row *model.WeatherRow) float64 {
	switch {
	case r.driver >= 0 && !math.IsNaN(row.Values[r.driver]):
		return row.Values[r.driver]
	case r.u >= 0:
		return math.Hypot(row.Values[r.u], row.Values[r.v])
	}
	return math.NaN()
}

// keptRun returns w as the actor keeps it, with the indices of the
// variables the features need.
func (a *Actor) keptRun(w *model.WeatherRun) run {
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
	return r
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
	si, dup := a.seen.find(key)
	if dup {
		return fmt.Errorf("%w: interval %s already applied", ErrDuplicate, r.IntervalStart.Format(time.RFC3339))
	}
	a.seen.insert(si, key, struct{}{})
	if a.cfg.MeterFlat > 0 {
		if e, ok := a.flat.observe(a.site.ID, r, a.site.CapacityMW, a.cfg.MeterFlat); ok {
			a.events = append(a.events, e)
		}
	}
	if a.site.Kind == model.KindPV && !math.IsNaN(r.PowerMW) {
		if a.firstMeter.IsZero() {
			a.firstMeter = r.IntervalStart
		}
		if r.PowerMW > 0 {
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
	if i, ok := a.pending.find(key); ok && a.pending.vals[i].minutes == r.IntervalMinutes {
		t := a.pending.vals[i]
		a.settle(t, r, end)
		a.pending.remove(i)
		a.freeT = append(a.freeT, t)
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
	// Only a target starting before the horizon can end before it.
	a.pending.dropFront(horizon, func(k int64, tg *target) bool {
		if k+int64(tg.minutes) >= horizon {
			return false
		}
		a.release(tg)
		a.freeT = append(a.freeT, tg)
		return true
	})
	a.seen.dropFront(horizon-24*60, nil)
	a.night.dropFront(horizon, nil)
}

// keyed holds values sorted by an int64 key, an interval start in unix
// minutes. Keys come mostly in increasing order and leave mostly from the
// front, so two slices serve better than a map: a lookup is a binary
// search, a refresh walks its steps with a cursor, pruning looks at the
// front only, and nothing is allocated once the slices have grown.
type keyed[V any] struct {
	keys []int64
	vals []V
}

// find returns the index of key k, or where it would go, and whether it
// is there.
func (s *keyed[V]) find(k int64) (int, bool) {
	return slices.BinarySearch(s.keys, k)
}

// seek is find for a key known to be at or after index from: a walk, for
// keys visited in increasing order.
func (s *keyed[V]) seek(from int, k int64) (int, bool) {
	i := from
	for i < len(s.keys) && s.keys[i] < k {
		i++
	}
	return i, i < len(s.keys) && s.keys[i] == k
}

// insert puts (k, v) at index i, which find or seek returned for k.
func (s *keyed[V]) insert(i int, k int64, v V) {
	s.keys = slices.Insert(s.keys, i, k)
	s.vals = slices.Insert(s.vals, i, v)
}

// remove removes the entry at index i.
func (s *keyed[V]) remove(i int) {
	s.keys = slices.Delete(s.keys, i, i+1)
	s.vals = slices.Delete(s.vals, i, i+1)
}

// dropFront removes the entries with a key below lim for which drop
// returns true (all of them when drop is nil).
func (s *keyed[V]) dropFront(lim int64, drop func(k int64, v V) bool) {
	n, _ := s.find(lim) // entries [0, n) have keys below lim
	if drop == nil {
		s.keys = slices.Delete(s.keys, 0, n)
		s.vals = slices.Delete(s.vals, 0, n)
		return
	}
	kept := 0
	for i := 0; i < n; i++ {
		if !drop(s.keys[i], s.vals[i]) {
			s.keys[kept], s.vals[kept] = s.keys[i], s.vals[i]
			kept++
		}
	}
	if kept < n {
		s.keys = slices.Delete(s.keys, kept, n)
		s.vals = slices.Delete(s.vals, kept, n)
	}
}

func (a *Actor) release(tg *target) {
	for b, r := range tg.rec {
		if r != noRec {
			a.freeRec = append(a.freeRec, r)
			tg.rec[b] = noRec
		}
	}
}

// record returns pending record r: its features, raw quantiles and
// published quantiles.
func (a *Actor) record(r int32) (x *pendingX, raw []float32, pub []float64) {
	nl := len(a.cfg.Levels)
	c, k := r/recChunk, int(r%recChunk)
	return &a.recX[c][k], a.recRaw[c][k*nl : (k+1)*nl : (k+1)*nl], a.recPub[c][k*nl : (k+1)*nl : (k+1)*nl]
}

// newRecord returns a record number not in use.
func (a *Actor) newRecord() int32 {
	if k := len(a.freeRec); k > 0 {
		r := a.freeRec[k-1]
		a.freeRec = a.freeRec[:k-1]
		return r
	}
	if a.nrec%recChunk == 0 {
		a.recX = append(a.recX, make([]pendingX, recChunk))
		a.recRaw = append(a.recRaw, make([]float32, recChunk*len(a.cfg.Levels)))
		a.recPub = append(a.recPub, make([]float64, recChunk*len(a.cfg.Levels)))
	}
	a.nrec++
	return a.nrec - 1
}

// keep stores x, the features of a step issued in a lead bucket, in a
// pending record's features.
func keep(px *pendingX, x *model.Features, run *model.WeatherRun) {
	*px = pendingX{validStart: x.ValidStart, lead: x.LeadMinutes, avail: x.Availability,
		driver: x.Driver, runAge: x.RunAgeMinutes, lastPower: x.LastPowerMW, night: x.Night,
		row: x.Weather, run: run}
}

// expand writes to x the features a pending record of a target of the
// given minutes in a lead bucket was issued with (features built them).
func (a *Actor) expand(x *model.Features, px *pendingX, minutes, bucket int) {
	*x = model.Features{
		ValidStart:    px.validStart,
		ValidMinutes:  minutes,
		LeadMinutes:   px.lead,
		Bucket:        bucket,
		CapacityMW:    a.site.CapacityMW,
		Availability:  px.avail,
		Driver:        px.driver,
		RunAgeMinutes: px.runAge,
		LastPowerMW:   px.lastPower,
		Night:         px.night,
		Weather:       px.row,
	}
	if px.run != nil {
		x.WeatherVars = px.run.Vars
	}
	h, m := hourMinute(px.validStart, time.Duration(minutes)*time.Minute/2)
	x.HourUTC = float64(h) + float64(m)/60
}

// settle scores every forecast pending for the reading's interval, then
// lets the forecaster learn from it once.
func (a *Actor) settle(tg *target, r *model.Reading, at time.Time) {
	nl := len(a.cfg.Levels)
	y := r.PowerMW
	a.learn = a.learn[:0]
	for b, rec := range tg.rec {
		if rec == noRec {
			continue
		}
		px, raw, pub := a.record(rec)
		if r.Curtailed {
			continue
		}
		if px.night {
			continue
		}
		// The forecaster learns from the bucket's kept forecast, the one
		// its calibrators judge: one drawn from those issued for the
		// interval in the bucket, so that it learns every lead the bucket
		// serves. (It learned from the latest, the bucket's shortest lead,
		// until the open data showed the cost: serf-pv-15min's 36h+ bucket
		// 2.8 points off calibrated, 1.4 with this; GEFCom2014 solar
		// intraday pinball 0.02131, 0.02079 with this.)
		x := &a.learnX[b]
		a.expand(x, px, tg.minutes, b)
		a.learn = append(a.learn, x)
		// The PIT of the raw forecast as it would have been published:
		// clipped to [0, available capacity], so that an outcome at a
		// bound (no output, full output) ties with the quantiles clipped
		// there, as the calibrated ones are judged (dtaci's experts and
		// the raw monitor read it).
		hi := a.site.CapacityMW * px.avail
		for j, v := range raw {
			a.rawCut[j] = max(0, min(hi, float64(v)))
		}
		w := a.issueWeight(b, px.issued)
		u := conformal.TieDraw(a.siteHash, r.IntervalStart, b)
		pit := pitOf(a.cfg.Levels, a.rawCut, y, u)
		for j := 0; j < nl; j++ {
			c := &a.cells[b*nl+j]
			hit := conformal.TieHit(a.cfg.Levels, pub, j, y, u)
			// The calibrator learns from the published quantile as
			// judged, ties at a point mass included.
			issued := pub[j]
			if y == issued && !hit {
				issued = math.Nextafter(y, math.Inf(-1))
			}
			lag := -1
			if px.settledAt >= 0 {
				lag = c.settled - int(px.settledAt)
			}
			c.cal.Update(conformal.Outcome{Y: y, Issued: issued, PIT: pit, Lag: lag, Weight: w})
			if c.corr != nil {
				l, o := c.corr.Correction()
				if c.settled == 0 {
					c.corrLevel, c.corrOffset = l, o
				} else {
					c.corrLevel += corrWeight * (l - c.corrLevel)
					c.corrOffset += corrWeight * (o - c.corrOffset)
				}
			}
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
	}
	if len(a.learn) > 0 {
		a.fc.Learn(y, a.learn) // buckets ascend: shortest lead first
	}
	a.release(tg)
}

// issuedWindow is how many settlements of a lead bucket the mean of
// forecasts issued per interval covers (a running mean over the first,
// then an exponential one).
const issuedWindow = 1000

// issueWeightMax bounds an outcome's weight to [1/issueWeightMax,
// issueWeightMax]: a truncated importance weight (Ionides 2008), which
// keeps a rare interval issued far more often than usual from taking a
// step many times the calibrator's own. Chosen among 3/2, 2 and 3 by
// the largest 36h+ error of aci (plumb backtest; GEFCom2012 wind /
// GEFCom2014 solar over the open-data test's year / serf-pv-15min): 3/2
// 0.14 / 0.40 / 1.28 points; 2: 0.38 / 0.38 / 1.01, with one more
// coverage alarm on serf-pv-15min's clean history (3 in 2.4 months, its
// noisier steps); 3: 0.45 / 0.40 / 1.30.
const issueWeightMax = 1.5

// issueWeight returns the weight of a settled forecast of lead bucket b
// kept from issued ones (conformal.Outcome.Weight): issued over the
// bucket's mean, truncated, and updates the mean. The kept forecast is
// one drawn alike from those issued for its interval (see replaces), so
// it stands for all of them; weighing it by their number makes the
// calibrators' long-run coverage that of every forecast issued, which is
// what the bots consume and the backtest scores. Unweighted, each interval
// counts once: on GEFCom2012 wind, whose runs reach 48 h, the 36h+ bucket
// issues 1 to 12 forecasts per interval by its hour against the runs (and
// fewer in the data's gaps), and its intervals issued most often were the
// ones covered least: the median level covered 0.489 over every forecast
// issued while the kept ones were covered 0.501. In a steady feed (a
// refresh per reading) every interval of a bucket is issued alike and the
// weight is 1.
func (a *Actor) issueWeight(b int, issued int32) float64 {
	n := float64(issued)
	m := a.issuedMean[b]
	if !(m > 0) {
		a.issuedMean[b] = n
		return 1
	}
	k := min(a.cells[b*len(a.cfg.Levels)].settled+1, issuedWindow)
	a.issuedMean[b] = m + (n-m)/float64(k)
	return max(1/issueWeightMax, min(issueWeightMax, n/m))
}

func (a *Actor) checkAlarm(c *cell, b, j int, at time.Time) {
	if changed, raised := c.mon.Check(); changed {
		a.siteAlarm(c.mon.Event(a.site.ID, a.cfg.Buckets.Name(b), at), raised,
			func(m *conformal.Monitor) bool { return m.Alarm.Raised() })
	}
	if changed, raised := c.mon.CheckRaw(); changed {
		a.siteAlarm(c.mon.RawEvent(a.site.ID, a.cfg.Buckets.Name(b), at), raised,
			func(m *conformal.Monitor) bool { return m.RawAlarm.Raised() })
	}
}

// siteAlarm publishes a (lead bucket, level) alarm's change as the site's
// alarm of its kind when it is the first raised or the last cleared: one
// weather spell or one fault moves many lead buckets and levels at once,
// and a person wants to hear of it once, not a hundred times. up tells
// whether a cell's alarm of the kind is raised. Changes are rare, so the
// count over the cells costs nothing that matters.
func (a *Actor) siteAlarm(e conformal.Event, raised bool, up func(*conformal.Monitor) bool) {
	n := 0
	for i := range a.cells {
		if up(a.cells[i].mon) {
			n++
		}
	}
	if (raised && n == 1) || (!raised && n == 0) {
		e.Cells = n
		a.events = append(a.events, e)
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
// grid of levels (0 or 1 outside the grid's span). Where y equals a run of
// quantiles (an atom: zero output, or full output, forecast with some
// probability) the PIT is drawn by u in [0, 1) across the atom's levels, as
// conformal.TieHit judges a tie: the randomised PIT, uniform under a
// calibrated forecast. Without the draw, every outcome in an atom had the
// PIT of the atom's top, which counted it above each quantile of the atom
// but the last (a miss where the quantile equals the outcome) and pushed
// the low levels' raw coverage, and dtaci's experts, the wrong way.
func pitOf(levels, q []float64, y, u float64) float64 {
	n := len(levels)
	if n == 0 || math.IsNaN(y) {
		return math.NaN()
	}
	if y < q[0] {
		return 0
	}
	if y > q[n-1] {
		return 1
	}
	for j := 0; j < n; j++ {
		switch {
		case y == q[j]:
			jb := j
			for jb+1 < n && q[jb+1] == y {
				jb++
			}
			if j == jb && j > 0 && jb < n-1 {
				return levels[j] // one quantile equal to y, no atom
			}
			lo, hi := 0.0, 1.0
			if j > 0 {
				lo = levels[j-1]
			}
			if jb < n-1 {
				hi = levels[jb]
			}
			return lo + u*(hi-lo)
		case y < q[j]:
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
	// Clip each v to max(0, min(hi, v)) (the built-ins treat NaN and
	// signed zeros as math.Max and math.Min do), then sort: clipping is
	// monotone, so this gives what sorting then clipping gives, bit for bit
	// (no -0 survives either way), and the values clipped to 0 or to hi no
	// longer cross, which leaves the sort little to do.
	hi := x.CapacityMW * x.Availability
	for j, v := range q {
		q[j] = max(0, min(hi, v))
	}
	// Without NaN, sorted is q[j-1] <= q[j] for all j, the quick test; a
	// NaN fails it and SortNearly sorts (NaNs first, as slices.Sort).
	for j := 1; j < len(q); j++ {
		if !(q[j-1] <= q[j]) {
			model.SortNearly(q)
			return
		}
	}
}

// ownQuantiles writes to own, for each calibrator j of a bucket, its own
// quantile: pre[rank[j]], the value its (level, offset) gave before the row
// was sorted, clipped to [0, available capacity] as publishable clips.
//
// Settlement judges each calibrator on it, and not on the published
// (sorted) row's j-th value: where two calibrators' levels cross, sorting
// hands each the other's value, so a calibrator that misses would raise
// its level and only push the other's value up, and both would run away
// (seen on GEFCom2014 solar: levels past 1.8 and below -5). On its own
// quantile each calibrator is the method as published. The coverage
// monitors are judged on the same values; the rows differ only where
// levels cross, by little.
func (a *Actor) ownQuantiles(own, pre []float64, rank []int32, x *model.Features) {
	hi := x.CapacityMW * x.Availability
	for j, k := range rank {
		own[j] = max(0, min(hi, pre[k]))
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

// features builds what the forecaster knows about the interval [t, t+step),
// whose lead (t.Sub(a.now) in whole minutes) and lead bucket the caller
// has found. x already holds what all the steps of a refresh share
// (ValidMinutes, CapacityMW, Availability, LastPowerMW); features sets
// every other field. Within one refresh it is called for increasing t:
// a.cursor holds, per kept run, how many of its rows start at or before
// the previous t and the end of the last of them (all zero at the first
// step), and a.nightAt where the previous step's key was in a.night.
func (a *Actor) features(x *model.Features, t time.Time, lead, bucket, step int) {
	x.ValidStart = t
	x.LeadMinutes = lead
	x.Bucket = bucket
	x.Driver = math.NaN()
	x.RunAgeMinutes = math.NaN()
	x.Night = false
	x.Weather, x.WeatherVars, a.xRun = nil, nil, nil
	h, m := hourMinute(t, time.Duration(step)*time.Minute/2)
	x.HourUTC = float64(h) + float64(m)/60 // of the middle of the interval
	for i := len(a.runs) - 1; i >= 0; i-- {
		r := &a.runs[i]
		if r.IssuedAt.After(a.now) {
			continue
		}
		// WeatherRun.At, resumed: rows are sorted, so the count of rows
		// starting at or before t only grows with t.
		cur := &a.cursor[i]
		c := cur.rows
		for c < len(r.Rows) && !r.Rows[c].ValidStart.After(t) {
			c++
		}
		if c == 0 {
			continue
		}
		if c != cur.rows {
			cur.rows, cur.end = c, r.Rows[c-1].End()
		}
		row := &r.Rows[c-1]
		if !t.Before(cur.end) {
			continue
		}
		if math.IsNaN(cur.age) {
			cur.age = a.now.Sub(r.IssuedAt).Minutes()
		}
		x.RunAgeMinutes = cur.age
		x.Weather, x.WeatherVars, a.xRun = row, r.Vars, r.WeatherRun
		x.Driver = r.driverOf(row)
		break
	}
	if a.site.Kind == model.KindPV {
		if a.site.HasLocation() {
			lat, lon := *a.site.Lat, *a.site.Lon
			key := unixMin(t)
			i, ok := a.night.seek(a.nightAt, key)
			if !ok {
				mid := t.Add(time.Duration(step) * time.Minute / 2)
				end := t.Add(time.Duration(step) * time.Minute)
				night := sunDown(t, lat, lon) && sunDown(mid, lat, lon) && sunDown(end, lat, lon)
				a.night.insert(i, key, night)
			}
			x.Night = a.night.vals[i]
			a.nightAt = i + 1
		} else {
			// No location: night where the meter has shown no output at
			// that time of day for darkSlots, and the run (if any)
			// forecasts no sun. A forecast alone is not enough: a night
			// step is certain to be zero, and a run's dawn is often an
			// hour off the meter's.
			x.Night = (math.IsNaN(x.Driver) || x.Driver <= 0) && a.dark(t, step)
		}
	}
}

// hourMinute returns the Hour and Minute of t.Add(d), from the Unix time
// when t is in UTC (the usual case, and cheaper); d is whole seconds.
func hourMinute(t time.Time, d time.Duration) (hour, minute int) {
	if t.Location() != time.UTC || d%time.Second != 0 {
		u := t.Add(d)
		return u.Hour(), u.Minute()
	}
	s := (t.Unix() + int64(d/time.Second)) % 86400
	if s < 0 {
		s += 86400
	}
	return int(s / 3600), int(s % 3600 / 60)
}

// darkSlots is how long a quarter-hour of the day must have shown no output
// (not the least positive reading), on every day with a reading, before a
// PV site without a location counts it as night (and then only where the
// run in force, if any, forecasts no sun).
const darkSlots = 14 * 24 * time.Hour

// dark reports whether every quarter-hour of the day in the step of
// minutes from t has shown no output for darkSlots while the site was
// observed that long.
func (a *Actor) dark(t time.Time, minutes int) bool {
	if a.firstMeter.IsZero() || a.now.Sub(a.firstMeter) < darkSlots {
		return false
	}
	for m := 0; m < max(minutes, 1); m += 15 {
		lit := a.lit[slotOf(t.Add(time.Duration(m)*time.Minute))]
		if !lit.IsZero() && a.now.Sub(lit) <= darkSlots {
			return false
		}
	}
	return true
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
//
// The bundle returned belongs to the actor and is valid until the next call
// of Refresh on it, which reuses its slices (so that a refresh does not
// allocate at steady state): a caller that keeps any of it longer copies
// it. Each calibrator of a lead bucket the bundle reaches is asked for its
// adjustment (Calibrator.Adjust) once per refresh rather than once per step
// (within a refresh no outcome comes in, so it says the same), and the
// forecaster is not asked for a PV step at night, whose quantiles are zero
// whatever it says.
func (a *Actor) Refresh() *model.Bundle {
	return a.RefreshInto(&a.bundle)
}

// RefreshInto is Refresh writing into dst, whose slices it reuses, and
// returning dst (or nil before any input). Actors that run one after the
// other (the sites of a pool shard) can share one dst instead of each
// keeping its own bundle, as Refresh does; dst is then valid until the next
// refresh into it.
func (a *Actor) RefreshInto(dst *model.Bundle) *model.Bundle {
	if a.now.IsZero() {
		return nil
	}
	step := a.step()
	stepDur := time.Duration(step) * time.Minute
	start := a.now.Truncate(stepDur)
	end := a.horizonEnd(a.now)
	n := int((end.Sub(start) + stepDur - 1) / stepDur)
	nl := len(a.cfg.Levels)
	b := dst
	*b = model.Bundle{
		Site:         a.site.ID,
		IssuedAt:     a.now,
		Watermark:    a.now,
		Model:        a.fc.Name(),
		CapacityMW:   a.site.CapacityMW,
		Availability: a.availability,
		Levels:       a.cfg.Levels,
		Steps:        slices.Grow(b.Steps[:0], n)[:n],
		Q:            slices.Grow(b.Q[:0], n*nl)[:n*nl],
		Expected:     slices.Grow(b.Expected[:0], n)[:n],
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
	a.gen++
	a.cursor = a.cursor[:0]
	for range a.runs {
		a.cursor = append(a.cursor, runCursor{age: math.NaN()})
	}
	a.nightAt, _ = a.night.find(unixMin(start))
	a.pendAt, _ = a.pending.find(unixMin(start))
	a.x = model.Features{
		ValidMinutes: step,
		CapacityMW:   a.site.CapacityMW,
		Availability: a.availability,
		LastPowerMW:  a.lastPower,
	}
	edges := a.cfg.Buckets.Edges
	bucket := 0
	lead0 := start.Sub(a.now)
	pq, pair := a.fc.(model.PairQuantiler)
	prePub := false // a.prePub holds the previous step's row before publishable
	for i := 0; i < n; i++ {
		d := time.Duration(i) * stepDur
		t := start.Add(d)
		lead := int((lead0 + d) / time.Minute) // t.Sub(a.now), in minutes
		// Buckets.Of, resumed: leads increase with t, and every edge passed
		// for a shorter lead is passed for this one.
		for bucket+1 < len(edges) && lead >= edges[bucket+1] {
			bucket++
		}
		b.Steps[i] = model.Step{ValidStart: t, ValidMinutes: step, LeadMinutes: lead}
		rec, fresh := a.pendingFor(t, step, bucket)
		px, raw, pub := a.record(rec)
		issued := int32(0)
		stays := false
		if !fresh {
			issued = px.issued
			if !a.replaces(t, bucket, issued) {
				// The pending forecast of this (interval, bucket) stays.
				px.issued++
				px, raw, pub = &a.spareX, a.spareRaw, a.sparePub
				stays = true
			}
		}
		x := &a.x
		a.features(x, t, lead, bucket, step)
		if !stays {
			keep(px, x, a.xRun)
			px.settledAt = int32(a.cells[bucket*nl].settled)
		}
		px.issued = issued + 1
		row := b.Row(i)
		// Every calibrator of the bucket is asked, at night too: a
		// calibrator may note what it issued (conformal.Split does).
		levels, offsets, zero := a.adjustments(bucket)
		same := false // row is the previous step's
		if x.Night {
			// publishable zeroes a night row whatever the quantiles, and
			// settlement passes night forecasts over: no need to ask the
			// forecaster.
			clear(row)
		} else {
			if stays {
				// The raw quantiles are kept for settlement only, and
				// this forecast is not kept: only the published row.
				a.fc.Quantiles(row, x, levels)
			} else {
				if pair {
					pq.QuantilesPair(a.rawQ, a.cfg.Levels, row, levels, x)
				} else {
					a.fc.Quantiles(a.rawQ, x, a.cfg.Levels)
					a.fc.Quantiles(row, x, levels)
				}
				for j, v := range a.rawQ {
					raw[j] = float32(v)
				}
			}
			// Adding a zero offset can only turn -0 into +0, which
			// clipping does anyway.
			if !zero {
				for j, o := range offsets {
					row[j] += o
				}
			}
			// Steps that share a weather row often give the same row
			// before publishable (which depends on the row and on the
			// capacity, the same for the whole bundle): then they publish
			// the previous step's row.
			if prePub && model.SameBits(row, a.prePub) {
				copy(row, b.Row(i-1))
				same = true
			} else {
				a.prePub = append(a.prePub[:0], row...)
				a.publishable(row, x)
			}
		}
		prePub = !x.Night
		if !stays {
			// Kept for settlement: each calibrator's own quantile, clipped
			// as published but before sorting, so that each learns from
			// what its own level gave (see ownQuantiles).
			if x.Night {
				clear(pub)
			} else {
				a.ownQuantiles(pub, a.prePub, a.adjRank[bucket*nl:(bucket+1)*nl], x)
			}
		}
		// Neighbouring steps often publish the same row (the weather runs
		// are hourly, the steps shorter): then their sums are the same too.
		if i > 0 && (same || model.SameBits(row, b.Row(i-1))) {
			b.Expected[i] = b.Expected[i-1]
			continue
		}
		sum := 0.0
		for _, v := range row {
			sum += v
		}
		b.Expected[i] = sum / float64(nl)
	}
	return b
}

// adjustments returns the levels to ask the forecaster for, and the offsets
// to add, for a lead bucket in this refresh; zero reports whether every
// offset is zero. The (level, offset) pairs come in the order of their
// levels, not of the calibrators: a refresh sorts each row it publishes, so
// the order the values are asked in does not change what is published, and
// in level order the forecaster's answer is already sorted, or nearly (the
// calibrators of neighbouring levels often cross).
func (a *Actor) adjustments(bucket int) (levels, offsets []float64, zero bool) {
	nl := len(a.cfg.Levels)
	lo, hi := bucket*nl, (bucket+1)*nl
	if a.adjGen[bucket] != a.gen {
		z := true
		for k := lo; k < hi; k++ {
			a.adjLevel[k], a.adjOffset[k] = a.cells[k].cal.Adjust()
			z = z && a.adjOffset[k] == 0
		}
		order, rank := a.adjOrder, a.adjRank[lo:hi]
		for j := range order {
			order[j] = int32(j)
		}
		sortPairs(a.adjLevel[lo:hi], a.adjOffset[lo:hi], order)
		for k, j := range order {
			rank[j] = int32(k)
		}
		a.adjGen[bucket] = a.gen
		a.adjZero[bucket] = z
	}
	return a.adjLevel[lo:hi:hi], a.adjOffset[lo:hi:hi], a.adjZero[bucket]
}

// sortPairs sorts levels into increasing order, stably, and moves each
// offset and index with its level (insertion sort: the calibrated levels
// cross rarely and by little).
func sortPairs(levels, offsets []float64, idx []int32) {
	for i := 1; i < len(levels); i++ {
		l, o, x := levels[i], offsets[i], idx[i]
		j := i
		for j > 0 && l < levels[j-1] {
			levels[j], offsets[j], idx[j] = levels[j-1], offsets[j-1], idx[j-1]
			j--
		}
		levels[j], offsets[j], idx[j] = l, o, x
	}
}

// replaces reports whether a forecast issued now should replace the
// pending one of interval t in a lead bucket, after issued forecasts for
// it: with probability 1/(issued+1), drawn replayably (conformal.TieDraw).
// Each (interval, bucket) keeps one forecast for settlement, and this
// reservoir sampling keeps each forecast issued for it alike, so the
// outcomes a bucket's calibrators and residual pools learn from represent
// every lead of the bucket, as the forecasts they adjust do (keeping the
// latest would teach them the bucket's shortest lead only).
func (a *Actor) replaces(t time.Time, bucket int, issued int32) bool {
	u := conformal.TieDraw(a.siteHash, t, 1000+bucket+64*int(issued))
	return u*float64(issued+1) < 1
}

// pendingFor returns the pending record of (interval t, bucket), reusing a
// free one, and whether it is new. Within a refresh it is called for
// increasing t, and the search resumes at a.pendAt.
func (a *Actor) pendingFor(t time.Time, step, bucket int) (rec int32, fresh bool) {
	key := unixMin(t)
	i, ok := a.pending.seek(a.pendAt, key)
	a.pendAt = i + 1
	var tg *target
	if ok {
		tg = a.pending.vals[i]
	}
	if !ok || tg.minutes != step {
		if ok {
			a.release(tg)
		} else {
			if k := len(a.freeT); k > 0 {
				tg = a.freeT[k-1]
				a.freeT = a.freeT[:k-1]
			} else {
				tg = &target{rec: make([]int32, a.cfg.Buckets.Len())}
				for b := range tg.rec {
					tg.rec[b] = noRec
				}
			}
			a.pending.insert(i, key, tg)
		}
		tg.minutes = step
	}
	if tg.rec[bucket] == noRec {
		tg.rec[bucket] = a.newRecord()
		fresh = true
	}
	return tg.rec[bucket], fresh
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

// CellReport is the coverage monitor's reading of one (lead bucket, level)
// of a site: what a person checks when an alarm is raised. Coverage is the
// share of settled outcomes at or below the quantile.
type CellReport struct {
	LeadBucket string  `json:"lead_bucket"`
	Level      float64 `json:"level"`
	// Settled counts the forecasts settled since the site started (or its
	// snapshots); Window the latest of them the rolling figures are over.
	Settled int `json:"settled"`
	Window  int `json:"window"`
	// Coverage and RawCoverage are over the window, of the published
	// quantile and of the raw model's; the EW ones are exponentially
	// weighted (half-life 96 settlements). All are zero before the first
	// settlement.
	Coverage      float64 `json:"coverage"`
	RawCoverage   float64 `json:"raw_coverage"`
	EWCoverage    float64 `json:"ew_coverage"`
	RawEWCoverage float64 `json:"raw_ew_coverage"`
	// KupiecP and ChristoffersenP are the p-values of the unconditional
	// coverage and independence tests on the window (1 for an empty one).
	// Outcomes of one site are correlated for days: read them as a guide.
	KupiecP         float64 `json:"kupiec_p"`
	ChristoffersenP float64 `json:"christoffersen_p"`
	// CalibratedLevel and Offset are the calibrator's correction now: the
	// level it asks the forecaster for and the offset it adds (MW); zero
	// for a calibrator that cannot tell (not a conformal.Corrector). The
	// trends are the correction now less its mean over about a day of
	// settlements (half-life 96): a calibrator working hard moves fast.
	CalibratedLevel float64 `json:"calibrated_level"`
	Offset          float64 `json:"offset"`
	LevelTrend      float64 `json:"level_trend"`
	OffsetTrend     float64 `json:"offset_trend"`
	// The two alarms of the pair: raised or not, and the last z.
	CoverageOff bool    `json:"coverage_off"`
	CoverageZ   float64 `json:"coverage_z"`
	RawDrift    bool    `json:"raw_drift"`
	RawZ        float64 `json:"raw_z"`
}

// Coverage returns the monitor's reading of every (lead bucket, level), by
// lead bucket then level. The slice is the caller's.
func (a *Actor) Coverage() []CellReport {
	nl := len(a.cfg.Levels)
	out := make([]CellReport, len(a.cells))
	for i := range a.cells {
		c, lvl := &a.cells[i], a.cfg.Levels[i%nl]
		m := c.mon
		r := CellReport{
			LeadBucket: a.cfg.Buckets.Name(i / nl), Level: lvl, Settled: c.settled, Window: m.Calibrated.Count(),
			Coverage: m.Calibrated.Coverage(), RawCoverage: m.Raw.Coverage(),
			EWCoverage: m.CalibratedEW.Coverage(), RawEWCoverage: m.RawEW.Coverage(),
			KupiecP: 1, ChristoffersenP: 1,
			CoverageOff: m.Alarm.Raised(), CoverageZ: m.Alarm.Z(),
			RawDrift: m.RawAlarm.Raised(), RawZ: m.RawAlarm.Z(),
		}
		for _, v := range []*float64{&r.Coverage, &r.RawCoverage, &r.EWCoverage, &r.RawEWCoverage} {
			if math.IsNaN(*v) {
				*v = 0 // nothing settled yet
			}
		}
		if n := m.Calibrated.Count(); n > 0 {
			_, r.KupiecP = conformal.Kupiec(m.Calibrated.Misses(), n, 1-lvl)
			_, r.ChristoffersenP = m.Calibrated.Transitions().Test()
		}
		if c.corr != nil {
			r.CalibratedLevel, r.Offset = c.corr.Correction()
			r.LevelTrend, r.OffsetTrend = r.CalibratedLevel-c.corrLevel, r.Offset-c.corrOffset
		}
		out[i] = r
	}
	return out
}
