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
	// ProfileHalfLife is the half-life, in days (updates of each
	// quarter-hour of the day), of the mean output by time of day used
	// where no weather run covers an interval; 0 means 14. The profile
	// must follow the season, as sunrise and sunset move: with the
	// curve's 200 it lagged by months, and the calibrators of GEFCom2014
	// solar's 36h+ bucket (past the day-ahead runs, so from the profile)
	// were left 1.5 points off chasing it; with 14, 0.6 points, and the
	// raw model's mean pinball loss over all leads 7 % lower (serf-pv-15min:
	// 36h+ 1.4 -> 1.0 points, pinball loss 2 % higher).
	ProfileHalfLife float64
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
	if o.ProfileHalfLife <= 0 {
		o.ProfileHalfLife = 14
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

	// Residuals per unit, as sortedRings with uint16 indices when the
	// window allows (the usual case), else uint32; one pair is nil.
	pools16, all16 []sortedRing[uint16] // [bucket*nClasses+class], [bucket]: every class pooled
	pools32, all32 []sortedRing[uint32]

	// gen counts the calls of Learn, the only method that changes the
	// state above; the memos below hold for the gen they were made in.
	gen  uint64
	est  estimateMemo
	memo [2]quantileMemo // the two latest answers of Quantiles
	next int             // the entry of memo the next new answer goes to
}

// estimateMemo is the latest point estimate made from a weather driver
// alone (the learned curve, or the PV rule of thumb): in the same gen, the
// same driver gives the same estimate.
type estimateMemo struct {
	ok     bool
	gen    uint64
	driver uint64 // math.Float64bits of Features.Driver
	e      float64
}

// quantileMemo is one answer of Quantiles kept for reuse. The quantiles
// depend only on the levels, the point estimate, the lead bucket and the
// available capacity, and on the state, so in the same gen the same inputs
// (floats compared bit for bit) give the same answer. A refresh asks for the
// same two grids of levels (nominal and calibrated) step after step, and the
// weather driver changes only every few steps, so most calls are answered
// from here.
type quantileMemo struct {
	ok        bool
	gen       uint64
	bucket    int
	e, capMW  uint64 // math.Float64bits
	levels, q []float64
}

// lookup returns the memo entry answering the call, or nil.
func (b *Baseline) lookup(bucket int, e, capMW float64, levels []float64) *quantileMemo {
	for k := range b.memo {
		m := &b.memo[k]
		if !m.ok || m.gen != b.gen || m.bucket != bucket || m.e != math.Float64bits(e) ||
			m.capMW != math.Float64bits(capMW) || len(m.levels) != len(levels) {
			continue
		}
		same := true
		ml := m.levels[:len(levels)]
		for j, l := range levels {
			if math.Float64bits(l) != math.Float64bits(ml[j]) {
				same = false
				break
			}
		}
		if same {
			b.next = 1 - k // keep this entry, replace the other next
			return m
		}
	}
	return nil
}

// remember keeps an answer of Quantiles in the memo.
func (b *Baseline) remember(bucket int, e, capMW float64, levels, q []float64) {
	m := &b.memo[b.next]
	b.next = 1 - b.next
	m.ok, m.gen, m.bucket = true, b.gen, bucket
	m.e, m.capMW = math.Float64bits(e), math.Float64bits(capMW)
	m.levels = append(m.levels[:0], levels...)
	m.q = append(m.q[:0], q...)
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
	if o.Window <= maxRing16 {
		b.pools16, b.all16 = newRings[uint16](nb, o.Window)
	} else {
		b.pools32, b.all32 = newRings[uint32](nb, o.Window)
	}
	return b
}

// newRings returns the per-class and the pooled residual windows of nb
// lead buckets.
func newRings[I ringIndex](nb, window int) (pools, all []sortedRing[I]) {
	pools = make([]sortedRing[I], nb*nClasses)
	all = make([]sortedRing[I], nb)
	for i := range pools {
		pools[i] = newSortedRing[I](window)
	}
	for i := range all {
		all[i] = newSortedRing[I](window)
	}
	return pools, all
}

// Name implements Forecaster.
func (b *Baseline) Name() string { return "baseline" }

// estimate returns the point estimate in per-unit of available capacity.
func (b *Baseline) estimate(x *Features) float64 {
	if !math.IsNaN(x.Driver) {
		d := math.Float64bits(x.Driver)
		if b.est.ok && b.est.gen == b.gen && b.est.driver == d {
			return b.est.e
		}
		e, ok := b.curve(x.Driver)
		if !ok && b.kind == KindPV {
			e, ok = min(1, max(0, x.Driver/1000*0.8)), true
		}
		if ok {
			b.est = estimateMemo{ok: true, gen: b.gen, driver: d, e: e}
			return e
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
	w = max(0, min(1, w)) // the built-ins treat NaN and signed zeros as math.Max and math.Min do
	return b.binMean[lo]*(1-w) + b.binMean[hi]*w, true
}

// Quantiles implements Forecaster.
func (b *Baseline) Quantiles(dst []float64, x *Features, levels []float64) {
	if len(dst) != len(levels) {
		panic("model: Baseline.Quantiles: len(dst) != len(levels)")
	}
	capMW := avail(x)
	e := b.estimate(x)
	bucket := min(max(x.Bucket, 0), b.o.Buckets.Len()-1)
	if m := b.lookup(bucket, e, capMW, levels); m != nil {
		copy(dst, m.q)
		return
	}
	if b.pools16 != nil {
		quantilesFrom(dst, levels, b.pools16, b.all16, bucket, b.o.MinResiduals, e, capMW)
	} else {
		quantilesFrom(dst, levels, b.pools32, b.all32, bucket, b.o.MinResiduals, e, capMW)
	}
	b.remember(bucket, e, capMW, levels, dst)
}

// quantilesFrom writes the quantiles at levels of the point estimate e (per
// unit) plus the residuals of the bucket's pool of e's class, or of the
// bucket's pooled residuals when the class has fewer than minRes, or, with
// fewer there too, of a uniform spread over [0, capMW].
func quantilesFrom[I ringIndex](dst, levels []float64, pools, all []sortedRing[I], bucket, minRes int, e, capMW float64) {
	pool := &pools[bucket*nClasses+classOf(e)]
	if pool.len() < minRes {
		pool = &all[bucket]
	}
	warm := pool.len() >= minRes
	dst = dst[:len(levels)]
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		case !warm:
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
	// Whatever follows changes the state: the memos made before, or made
	// here before the curve learns, are stale once Learn returns.
	defer func() { b.gen++ }()
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
		bucket := min(max(x.Bucket, 0), b.o.Buckets.Len()-1)
		k := bucket*nClasses + classOf(e)
		if b.pools16 != nil {
			b.pools16[k].add(pu - e)
			b.all16[bucket].add(pu - e)
		} else {
			b.pools32[k].add(pu - e)
			b.all32[bucket].add(pu - e)
		}
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
	b.profile[k] += math.Max(1/b.profileN[k], math.Ln2/b.o.ProfileHalfLife) * (pu - b.profile[k])
}
