package model

import "math"

// BaselineOptions configures the Baseline forecaster. Zero fields take the
// documented defaults.
type BaselineOptions struct {
	// Buckets are the lead buckets residuals are pooled over; zero value means
	// DefaultBuckets.
	Buckets Buckets
	// Window is how many residuals each (lead bucket, output class) keeps;
	// 0 means 720 (a month of hourly intervals).
	Window int
	// MinResiduals is how many residuals a pool needs before its quantiles are
	// used; below it the forecaster falls back to the bucket's pooled
	// residuals, then to a uniform spread over [0, capacity]. 0 means 30.
	MinResiduals int
	// CurveHalfLife is the half-life, in settled intervals, of the running
	// means of the learned driver-to-power curve; 0 means 200.
	CurveHalfLife float64
}

func (o BaselineOptions) withDefaults() BaselineOptions {
	if o.Buckets.Len() == 0 {
		o.Buckets = DefaultBuckets()
	}
	if o.Window <= 0 {
		o.Window = 720
	}
	if o.MinResiduals <= 0 {
		o.MinResiduals = 30
	}
	if o.CurveHalfLife <= 0 {
		o.CurveHalfLife = 200
	}
	return o
}

// Output classes: residual spread depends strongly on the expected output
// (zero near dawn and at calm, widest on the steep part of a power curve), so
// residuals are pooled separately for low, middle and high estimates.
var classEdges = [...]float64{0.15, 0.5} // per-unit of available capacity

func classOf(pu float64) int {
	switch {
	case pu < classEdges[0]:
		return 0
	case pu < classEdges[1]:
		return 1
	}
	return 2
}

const nClasses = len(classEdges) + 1

// Baseline is the classic probabilistic baseline: a point estimate plus the
// empirical quantiles of its recent residuals, pooled by lead bucket and by
// output class.
//
// The point estimate is physical-statistical: a curve from the weather run's
// main driver (irradiance for PV, wind speed for wind) to per-unit output,
// learned online as running means over driver bins and read by linear
// interpolation. Before the curve has data, PV uses GHI/1000 times 0.8 (a
// rough performance ratio, common practice). Without a driver the estimate
// is persistence (the latest reading) for the first hour and the site's
// mean output at that time of day beyond.
//
// Residuals are stored per unit of available capacity, so a pool serves a
// site whatever its availability.
type Baseline struct {
	kind Kind
	o    BaselineOptions

	// Driver curve: running mean per-unit output per bin.
	binWidth float64
	binMean  []float64
	binN     []float64

	// Diurnal profile: running mean per-unit output per quarter-hour of the day.
	profile, profileN [96]float64

	pools []residualPool // [bucket*nClasses+class]
	all   []residualPool // [bucket]: every class pooled
}

// NewBaseline returns a Baseline for a site of the given kind.
func NewBaseline(kind Kind, o BaselineOptions) *Baseline {
	o = o.withDefaults()
	b := &Baseline{kind: kind, o: o}
	switch kind {
	case KindPV:
		b.binWidth = 25 // W/m2, up to 1500
		b.binMean = make([]float64, 60)
	default:
		b.binWidth = 0.5 // m/s, up to 40
		b.binMean = make([]float64, 80)
	}
	b.binN = make([]float64, len(b.binMean))
	nb := o.Buckets.Len()
	b.pools = make([]residualPool, nb*nClasses)
	b.all = make([]residualPool, nb)
	for i := range b.pools {
		b.pools[i] = newResidualPool(o.Window)
	}
	for i := range b.all {
		b.all[i] = newResidualPool(o.Window)
	}
	return b
}

// Name implements Forecaster.
func (b *Baseline) Name() string { return "baseline" }

// estimate returns the point estimate in per-unit of available capacity.
func (b *Baseline) estimate(x *Features) float64 {
	if !math.IsNaN(x.Driver) {
		if e, ok := b.curve(x.Driver); ok {
			return e
		}
		if b.kind == KindPV {
			return math.Min(1, math.Max(0, x.Driver/1000*0.8))
		}
	}
	// No weather driver: persistence for the next hour, then the site's
	// mean output at that time of day, then persistence again.
	last := !math.IsNaN(x.LastPowerMW) && x.CapacityMW > 0
	if last && x.LeadMinutes < 60 {
		return x.LastPowerMW / avail(x)
	}
	if k := profileSlot(x); b.profileN[k] > 0 {
		return b.profile[k]
	}
	if last {
		return x.LastPowerMW / avail(x)
	}
	return 0.5
}

// profileSlot is the quarter-hour of the day of the interval's start.
func profileSlot(x *Features) int {
	t := x.ValidStart.UTC()
	return (t.Hour()*60 + t.Minute()) / 15
}

func avail(x *Features) float64 {
	a := x.Availability
	if !(a > 0) {
		a = 1
	}
	return x.CapacityMW * a
}

// curve interpolates the learned driver curve; ok is false if it has no data
// on at least one side of d within reach.
func (b *Baseline) curve(d float64) (float64, bool) {
	if d < 0 {
		d = 0
	}
	pos := d/b.binWidth - 0.5 // bin centres at (i+0.5)*width
	i := int(math.Floor(pos))
	// Nearest populated bins to the left and right.
	lo, hi := -1, -1
	for k := min(i, len(b.binN)-1); k >= 0; k-- {
		if b.binN[k] > 0 {
			lo = k
			break
		}
	}
	for k := max(i+1, 0); k < len(b.binN); k++ {
		if b.binN[k] > 0 {
			hi = k
			break
		}
	}
	switch {
	case lo < 0 && hi < 0:
		return 0, false
	case lo < 0:
		if b.kind == KindPV && d == 0 {
			return 0, true
		}
		return b.binMean[hi], hi-i <= 4
	case hi < 0:
		return b.binMean[lo], i-lo <= 4
	}
	w := (pos - float64(lo)) / float64(hi-lo)
	w = math.Max(0, math.Min(1, w))
	return b.binMean[lo]*(1-w) + b.binMean[hi]*w, true
}

// Quantiles implements Forecaster.
func (b *Baseline) Quantiles(dst []float64, x *Features, levels []float64) {
	if len(dst) != len(levels) {
		panic("model: Baseline.Quantiles: len(dst) != len(levels)")
	}
	capMW := avail(x)
	e := b.estimate(x)
	bucket := min(max(x.Bucket, 0), len(b.all)-1)
	pool := &b.pools[bucket*nClasses+classOf(e)]
	if pool.len() < b.o.MinResiduals {
		pool = &b.all[bucket]
	}
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		case pool.len() < b.o.MinResiduals:
			dst[j] = l * capMW // know nothing yet: uniform over [0, capacity]
		default:
			dst[j] = (e + pool.quantile(l)) * capMW
		}
	}
}

// Learn implements Forecaster: every pending forecast adds its residual to
// its lead bucket's pools; the curve and the mean learn once, from the
// shortest-lead forecast.
func (b *Baseline) Learn(y float64, xs []*Features) {
	if len(xs) == 0 || math.IsNaN(y) {
		return
	}
	for _, x := range xs {
		capMW := avail(x)
		if !(capMW > 0) {
			continue
		}
		pu := y / capMW
		e := b.estimate(x)
		bucket := min(max(x.Bucket, 0), len(b.all)-1)
		b.pools[bucket*nClasses+classOf(e)].add(pu - e)
		b.all[bucket].add(pu - e)
	}
	x := xs[0]
	capMW := avail(x)
	if !(capMW > 0) {
		return
	}
	pu := y / capMW
	a := math.Ln2 / b.o.CurveHalfLife
	if !math.IsNaN(x.Driver) {
		k := int(math.Max(0, x.Driver) / b.binWidth)
		if k >= len(b.binN) {
			k = len(b.binN) - 1
		}
		b.binN[k]++
		b.binMean[k] += math.Max(1/b.binN[k], a) * (pu - b.binMean[k])
	}
	k := profileSlot(x)
	b.profileN[k]++
	b.profile[k] += math.Max(1/b.profileN[k], a) * (pu - b.profile[k])
}
