package model

import (
	"math"
	"time"
)

// This file holds the two reference forecasters every other forecaster is
// measured against: Climatology, which knows only the time of day, and
// Persistence, which knows only the latest reading. Both give empirical
// quantiles of type 7 of Hyndman and Fan (1996): linear interpolation
// between the order statistics of the window, the default of R and NumPy
// (see residualPool.quantile).

const minutesPerDay = 24 * 60

// ClimatologyOptions configures the Climatology forecaster. Zero fields take
// the documented defaults.
type ClimatologyOptions struct {
	// Days is how many days of outcomes each time-of-day slot keeps; 0 (or
	// less) means 30.
	Days int
}

func (o ClimatologyOptions) withDefaults() ClimatologyOptions {
	if o.Days <= 0 {
		o.Days = 30
	}
	return o
}

// pooledPerDay sizes the climatology's pooled fallback: it keeps Days x 96
// outcomes, Days days of 15-minute intervals (fewer days at a finer
// resolution, the age bound still applying).
const pooledPerDay = 96

// Climatology forecasts the quantiles of the site's past output at the same
// time of day, whatever the weather and the lead time.
//
// A slot is the minute of day (UTC) of an interval's start, so hourly data
// fills 24 slots and 15-minute data 96. Each slot keeps the outcomes of the
// last Days days: at most Days values (a ring, one per day when every day has
// a reading), of which those whose interval starts Days x 24 h or more before
// the latest interval learned are dropped, so that gaps in the readings do not
// leave stale values behind. Age is judged against the latest interval
// learned in event time, after every Learn and in every slot; values are
// dropped oldest-learned first (a reading settled late, out of order, is
// dropped with its neighbours in arrival order).
//
// The quantile at a level is the type-7 empirical quantile of the slot's
// values, in MW (not per unit: the outcomes are kept as read). With no value
// yet in the slot it falls back to the outcomes of every slot pooled (the
// latest Days x 96, within the same age bound), and with none at all to a
// uniform spread over [0, capacity x availability].
type Climatology struct {
	o      ClimatologyOptions
	slots  []*datedPool // [minute of day]; nil until the slot learns a value
	active []int        // minutes of day with a slot, in order of creation
	all    datedPool    // every slot pooled
	latest int64        // start (unix minutes) of the latest interval learned
	seen   bool         // latest is set
}

// NewClimatology returns a Climatology forecaster.
func NewClimatology(o ClimatologyOptions) *Climatology {
	o = o.withDefaults()
	return &Climatology{
		o:     o,
		slots: make([]*datedPool, minutesPerDay),
		all:   newDatedPool(o.Days * pooledPerDay),
	}
}

// Name implements Forecaster.
func (c *Climatology) Name() string { return "climatology" }

func slotOf(t time.Time) int {
	t = t.UTC()
	return t.Hour()*60 + t.Minute()
}

// Quantiles implements Forecaster.
func (c *Climatology) Quantiles(dst []float64, x *Features, levels []float64) {
	if len(dst) != len(levels) {
		panic("model: Climatology.Quantiles: len(dst) != len(levels)")
	}
	var pool *residualPool
	if s := c.slots[slotOf(x.ValidStart)]; s != nil && s.pool.len() > 0 {
		pool = &s.pool
	} else if c.all.pool.len() > 0 {
		pool = &c.all.pool
	}
	capMW := avail(x)
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		case pool == nil:
			dst[j] = l * capMW // know nothing yet: uniform over [0, capacity]
		default:
			dst[j] = pool.quantile(l)
		}
	}
}

// Learn implements Forecaster: the outcome y joins the slot of the interval
// (xs[0].ValidStart; every element of xs describes the same interval) and
// the pooled fallback, then every slot drops the values that fell out of the
// last Days days. A non-finite y is ignored.
func (c *Climatology) Learn(y float64, xs []*Features) {
	if len(xs) == 0 || math.IsNaN(y) || math.IsInf(y, 0) {
		return
	}
	start := xs[0].ValidStart.Unix() / 60
	if !c.seen || start > c.latest {
		c.latest, c.seen = start, true
	}
	cutoff := c.latest - int64(c.o.Days)*minutesPerDay
	if start <= cutoff {
		return // settled so late it is already out of the window
	}
	k := slotOf(xs[0].ValidStart)
	s := c.slots[k]
	if s == nil {
		p := newDatedPool(c.o.Days)
		s = &p
		c.slots[k] = s
		c.active = append(c.active, k)
	}
	s.add(start, y)
	c.all.add(start, y)
	for _, k := range c.active {
		c.slots[k].dropUpTo(cutoff)
	}
	c.all.dropUpTo(cutoff)
}

// datedPool is a residualPool whose values carry the start (unix minutes) of
// their interval, so that old values can be dropped by age.
type datedPool struct {
	pool  residualPool
	start []int64 // parallel to pool.ring
}

func newDatedPool(n int) datedPool {
	return datedPool{pool: newResidualPool(n), start: make([]int64, n)}
}

func (d *datedPool) add(start int64, v float64) {
	d.start[d.pool.add(v)] = start
}

// dropUpTo drops, oldest-learned first, the values whose interval starts at
// or before cutoff.
func (d *datedPool) dropUpTo(cutoff int64) {
	for d.pool.len() > 0 && d.start[d.pool.oldest()] <= cutoff {
		d.pool.dropOldest()
	}
}

// PersistenceOptions configures the Persistence forecaster. Zero fields take
// the documented defaults.
type PersistenceOptions struct {
	// Buckets are the lead buckets errors are pooled over; zero value means
	// DefaultBuckets. Features.Bucket indexes them (clamped to the range).
	Buckets Buckets
	// Window is how many errors each lead bucket keeps (and the pooled
	// fallback too); 0 (or less) means 720 (a month of hourly intervals).
	Window int
	// MinErrors is how many errors a bucket needs before its quantiles are
	// used; below it the forecaster falls back to every bucket pooled, and
	// below it there too, to a uniform spread over [0, capacity x
	// availability]. 0 (or less) means 30.
	MinErrors int
}

func (o PersistenceOptions) withDefaults() PersistenceOptions {
	if o.Buckets.Len() == 0 {
		o.Buckets = DefaultBuckets()
	}
	if o.Window <= 0 {
		o.Window = 720
	}
	if o.MinErrors <= 0 {
		o.MinErrors = 30
	}
	return o
}

// Persistence forecasts the latest observed power plus the empirical
// quantiles of its past errors at the same lead.
//
// The point forecast is Features.LastPowerMW; when it is NaN, the mean of
// every outcome learned so far, and before any, half of capacity x
// availability. Errors are y - LastPowerMW of each pending forecast that had
// a finite LastPowerMW, kept per lead bucket (the latest Window) and pooled
// over every bucket (the latest Window of any bucket). The quantile at a
// level is the point forecast plus the type-7 empirical quantile of the
// bucket's errors, in MW; with fewer than MinErrors errors in the bucket it
// uses the pooled errors, and with fewer than MinErrors there too, a uniform
// spread over [0, capacity x availability].
type Persistence struct {
	o       PersistenceOptions
	buckets []residualPool
	all     residualPool
	mean    float64 // running mean of the outcomes learned
	n       float64
}

// NewPersistence returns a Persistence forecaster.
func NewPersistence(o PersistenceOptions) *Persistence {
	o = o.withDefaults()
	p := &Persistence{o: o, buckets: make([]residualPool, o.Buckets.Len()), all: newResidualPool(o.Window)}
	for i := range p.buckets {
		p.buckets[i] = newResidualPool(o.Window)
	}
	return p
}

// Name implements Forecaster.
func (p *Persistence) Name() string { return "persistence" }

// point returns the point forecast in MW.
func (p *Persistence) point(x *Features) float64 {
	switch {
	case !math.IsNaN(x.LastPowerMW):
		return x.LastPowerMW
	case p.n > 0:
		return p.mean
	}
	return avail(x) / 2
}

func (p *Persistence) bucket(x *Features) int {
	return min(max(x.Bucket, 0), len(p.buckets)-1)
}

// Quantiles implements Forecaster.
func (p *Persistence) Quantiles(dst []float64, x *Features, levels []float64) {
	if len(dst) != len(levels) {
		panic("model: Persistence.Quantiles: len(dst) != len(levels)")
	}
	pool := &p.buckets[p.bucket(x)]
	if pool.len() < p.o.MinErrors {
		pool = &p.all
	}
	e := p.point(x)
	capMW := avail(x)
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		case pool.len() < p.o.MinErrors:
			dst[j] = l * capMW // know nothing yet: uniform over [0, capacity]
		default:
			dst[j] = e + pool.quantile(l)
		}
	}
}

// Learn implements Forecaster: each pending forecast with a finite
// LastPowerMW adds its error y - LastPowerMW to its lead bucket and to the
// pooled errors; the mean output learns y once. A non-finite y is ignored.
func (p *Persistence) Learn(y float64, xs []*Features) {
	if len(xs) == 0 || math.IsNaN(y) || math.IsInf(y, 0) {
		return
	}
	for _, x := range xs {
		if math.IsNaN(x.LastPowerMW) || math.IsInf(x.LastPowerMW, 0) {
			continue
		}
		e := y - x.LastPowerMW
		p.buckets[p.bucket(x)].add(e)
		p.all.add(e)
	}
	p.n++
	p.mean += (y - p.mean) / p.n
}
