package wind

import (
	"fmt"
	"math"
)

// CurveOptions configures a Curve. The zero value means the defaults.
// Negative, NaN or infinite fields are programmer errors: NewCurve panics.
type CurveOptions struct {
	// BinWidth is the width of a wind-speed bin, m/s. Zero means 0.5 (the
	// bin width IEC 61400-12-1 uses for measured power curves [memory]).
	BinWidth float64
	// MaxSpeed is the upper end of the learned range, m/s: bins cover
	// [0, MaxSpeed) and samples at or above it are ignored. Zero means 30.
	MaxSpeed float64
	// MinCount is the number of samples a bin needs before its estimate
	// enters the fit; thinner bins are filled by interpolation between their
	// neighbours. Zero means 5. Until some bin reaches MinCount, every bin
	// with at least one sample is used, so a curve with any data at all is
	// defined.
	MinCount int
	// Memory bounds each bin's gain below at 1/Memory, so that a bin keeps
	// following slow changes (ageing, seasonal icing, a repowered turbine)
	// over roughly its last Memory samples; it also caps the bin's weight in
	// the monotone fit at Memory. Zero means no forgetting: all samples of a
	// bin weigh alike.
	Memory int
}

// maxBins bounds the number of bins, so that a snapshot cannot ask for an
// absurd allocation.
const maxBins = 1 << 16

// maxPerUnit bounds the magnitude of a per-unit power sample: a reading ten
// times the capacity is a unit error, not an observation of the curve.
const maxPerUnit = 10

// check validates resolved options and returns the number of bins.
func (o CurveOptions) check() (int, error) {
	if !(o.BinWidth > 0) || math.IsInf(o.BinWidth, 0) {
		return 0, fmt.Errorf("bin width %v is not a positive finite speed", o.BinWidth)
	}
	if !(o.MaxSpeed > 0) || math.IsInf(o.MaxSpeed, 0) {
		return 0, fmt.Errorf("max speed %v is not a positive finite speed", o.MaxSpeed)
	}
	if o.MinCount < 1 || o.MinCount > math.MaxInt32 {
		return 0, fmt.Errorf("min count %d outside [1, %d]", o.MinCount, math.MaxInt32)
	}
	if o.Memory < 0 || o.Memory > math.MaxInt32 {
		return 0, fmt.Errorf("memory %d outside [0, %d]", o.Memory, math.MaxInt32)
	}
	ratio := o.MaxSpeed / o.BinWidth
	if !(ratio <= maxBins) {
		return 0, fmt.Errorf("max speed %v over bin width %v gives more than %d bins", o.MaxSpeed, o.BinWidth, maxBins)
	}
	return max(1, int(math.Ceil(ratio))), nil
}

// resolve applies the defaults and panics on programmer misuse.
func (o CurveOptions) resolve() (CurveOptions, int) {
	if o.BinWidth == 0 {
		o.BinWidth = 0.5
	}
	if o.MaxSpeed == 0 {
		o.MaxSpeed = 30
	}
	if o.MinCount == 0 {
		o.MinCount = 5
	}
	nb, err := o.check()
	if err != nil {
		panic("wind: bad CurveOptions: " + err.Error())
	}
	return o, nb
}

// Curve is a wind power curve learned online from (speed, per-unit power)
// samples: per-unit power as a monotone non-decreasing function of wind
// speed (normalised to the reference density if the caller normalises).
//
// # Estimator
//
// Each speed bin keeps, in O(1) memory, a running estimate of the median of
// the power observed in it, updated by a Robbins-Monro step: m += g s
// sign(x - m), with gain g = 1/n (n the bin's sample count, or 1/Memory once
// n exceeds Memory) and scale s = 2 d, d a running mean of |x - m|. The step
// never carries m past the sample x. The median rather than the mean,
// because meter data hold outages and curtailment: a tenth of the readings
// stuck at zero drags a bin mean down by a tenth of its value, but moves the
// median by a small fraction of the noise. The scale keeps the step in the
// units of the bin's own spread: for Gaussian noise of deviation sigma,
// d is about 0.8 sigma and the step about 1.6 sigma/n, above the 0.63
// sigma/n the Robbins-Monro rate condition needs and near the efficient
// 1.25 sigma/n (1/(2 f(median)) [computed from the standard conditions]).
//
// # Fit
//
// Eval fits lazily after Adds: bins with at least MinCount samples are made
// monotone by pool-adjacent-violators (weighted isotonic regression, weights
// the bin counts, capped at Memory), thinner bins are filled by linear
// interpolation between the fitted neighbours, the curve rises linearly from
// min(0, first fitted value) at speed 0 to the first fitted bin, and it stays
// flat beyond the last fitted bin. Cut-out (power falling to zero above about
// 25 m/s) is not modelled: the high-speed tail is sparse in data, and
// monotonicity is held over the whole range; set MaxSpeed below cut-out to
// keep stopped-turbine readings out of the fit.
//
// A Curve is not safe for concurrent use, not even Eval alone (it refits
// lazily). The zero value is an empty curve with the default options. Do not
// copy a Curve after first use.
type Curve struct {
	opt   CurveOptions
	bins  []bin
	total uint64 // accepted samples, saturating

	stale  bool      // bins changed since the last fit
	fit    []float64 // fitted value at each bin centre
	anchor float64   // fitted value at speed 0

	// scratch for the fit, sized like bins
	idx        []int
	y, w       []float64
	blkV, blkW []float64
	blkN       []int
}

// bin is one speed bin's estimator state.
type bin struct {
	n   uint64  // samples seen, saturating
	med float64 // running median estimate
	mad float64 // running mean absolute deviation from med
}

// NewCurve returns an empty curve. It panics if an option is negative, NaN
// or infinite, or if the options ask for more than 65536 bins.
func NewCurve(o CurveOptions) *Curve {
	c := new(Curve)
	c.setup(o.resolve())
	return c
}

// setup allocates an empty curve for resolved options and nb bins.
func (c *Curve) setup(o CurveOptions, nb int) {
	*c = Curve{
		opt:  o,
		bins: make([]bin, nb),
		fit:  make([]float64, nb),
		idx:  make([]int, nb),
		y:    make([]float64, nb),
		w:    make([]float64, nb),
		blkV: make([]float64, nb),
		blkW: make([]float64, nb),
		blkN: make([]int, nb),
	}
}

// init makes the zero Curve usable.
func (c *Curve) init() {
	if c.bins == nil {
		c.setup(CurveOptions{}.resolve())
	}
}

// Options returns the curve's options with the defaults applied.
func (c *Curve) Options() CurveOptions {
	c.init()
	return c.opt
}

// Samples returns the number of samples the curve has accepted (saturating
// at the largest uint64).
func (c *Curve) Samples() uint64 { return c.total }

// Add learns one sample: wind speed (m/s) and the power observed at it per
// unit of capacity. It ignores samples it cannot place: NaN or infinite
// values, negative speeds, speeds at or above MaxSpeed, and per-unit powers
// beyond +-10 (unit errors). It is O(1) and does not allocate.
func (c *Curve) Add(speed, perUnitPower float64) {
	if !(speed >= 0) || !(math.Abs(perUnitPower) <= maxPerUnit) {
		return
	}
	c.init()
	if !(speed < c.opt.MaxSpeed) {
		return
	}
	i := min(int(speed/c.opt.BinWidth), len(c.bins)-1)
	c.bins[i].add(perUnitPower, c.opt.Memory)
	if c.total < math.MaxUint64 {
		c.total++
	}
	c.stale = true
}

// add updates the bin's median estimate with sample x (see Curve).
func (b *bin) add(x float64, memory int) {
	if b.n < math.MaxUint64 {
		b.n++
	}
	if b.n == 1 {
		b.med, b.mad = x, 0
		return
	}
	g := 1 / float64(b.n)
	if memory > 0 && b.n > uint64(memory) {
		g = 1 / float64(memory)
	}
	dev := x - b.med
	ad := math.Abs(dev)
	b.mad += g * (ad - b.mad)
	step := math.Min(2*b.mad*g, ad)
	if dev > 0 {
		b.med += step
	} else if dev < 0 {
		b.med -= step
	}
}

// weight is the bin's weight in the monotone fit.
func (b *bin) weight(memory int) float64 {
	if memory > 0 && b.n > uint64(memory) {
		return float64(memory)
	}
	return float64(b.n)
}

// Eval returns the learned per-unit power at speed (m/s), or NaN before any
// sample or for a NaN speed. Speeds at or below 0 give the value at 0, and
// speeds beyond the last fitted bin the value there. The result is
// non-decreasing in speed (up to floating-point rounding of the
// interpolation).
// After Adds the first Eval refits in O(bins); otherwise Eval is O(1).
// It does not allocate.
func (c *Curve) Eval(speed float64) float64 {
	if c.total == 0 || math.IsNaN(speed) {
		return math.NaN()
	}
	if c.stale {
		c.refit()
	}
	if speed <= 0 {
		return c.anchor
	}
	x := speed/c.opt.BinWidth - 0.5 // in bin-centre units
	if x <= 0 {
		return c.anchor + (c.fit[0]-c.anchor)*(x+0.5)/0.5
	}
	last := len(c.fit) - 1
	if x >= float64(last) {
		return c.fit[last]
	}
	i := int(x)
	return c.fit[i] + (x-float64(i))*(c.fit[i+1]-c.fit[i])
}

// refit recomputes the dense fitted table from the bins (see Curve).
func (c *Curve) refit() {
	c.stale = false
	k := c.gather(uint64(c.opt.MinCount))
	if k == 0 {
		k = c.gather(1)
	}
	if k == 0 { // unreachable while total > 0; keep the table defined
		clear(c.fit)
		c.anchor = 0
		return
	}
	y := c.y[:k]
	pava(y, c.w[:k], c.blkV, c.blkW, c.blkN)
	first, last := c.idx[0], c.idx[k-1]
	c.anchor = math.Min(0, y[0])
	for i := 0; i < first; i++ {
		c.fit[i] = c.anchor + (y[0]-c.anchor)*(float64(i)+0.5)/(float64(first)+0.5)
	}
	for j := 0; j+1 < k; j++ {
		a, b := c.idx[j], c.idx[j+1]
		for i := a; i < b; i++ {
			c.fit[i] = y[j] + (y[j+1]-y[j])*float64(i-a)/float64(b-a)
		}
	}
	for i := last; i < len(c.fit); i++ {
		c.fit[i] = y[k-1]
	}
}

// gather copies the bins holding at least need samples into the fit
// scratch (index, estimate, weight) and returns how many there are.
func (c *Curve) gather(need uint64) int {
	k := 0
	for i := range c.bins {
		if b := &c.bins[i]; b.n >= need {
			c.idx[k], c.y[k], c.w[k] = i, b.med, b.weight(c.opt.Memory)
			k++
		}
	}
	return k
}

// pava replaces y by its weighted isotonic (non-decreasing) regression, the
// pool-adjacent-violators algorithm: adjacent blocks whose means decrease
// are pooled into their weighted mean until none do. Weights w must be
// positive. val, wt and cnt are scratch of at least len(y). O(len(y)).
func pava(y, w, val, wt []float64, cnt []int) {
	top := -1
	for i := range y {
		top++
		val[top], wt[top], cnt[top] = y[i], w[i], 1
		for top > 0 && val[top-1] > val[top] {
			sw := wt[top-1] + wt[top]
			val[top-1] = (wt[top-1]*val[top-1] + wt[top]*val[top]) / sw
			wt[top-1] = sw
			cnt[top-1] += cnt[top]
			top--
		}
	}
	i := 0
	for b := 0; b <= top; b++ {
		for range cnt[b] {
			y[i] = val[b]
			i++
		}
	}
}
