package qr

import (
	"fmt"
	"math"
)

// Defaults of OnlineOptions.
const (
	// DefaultRate is the dimensionless step size eta.
	DefaultRate = 1.0
	// DefaultMemory is the forgetting window of the step statistics, in
	// updates: a little over two years of hourly settlements.
	DefaultMemory = 20000
	// DefaultAverage is the window of the iterate average that Predict uses,
	// in updates.
	DefaultAverage = 300
)

// OnlineOptions tunes an Online learner. The zero value gives the defaults,
// which need no tuning per site, per level or per data scale (see Online).
type OnlineOptions struct {
	// Rate is the dimensionless step size eta: a step moves the prediction
	// by about eta times the running mean absolute residual divided by the
	// square root of the number of updates remembered. Zero means
	// DefaultRate (1). Negative, infinite or NaN panics.
	Rate float64
	// Memory is the number of updates over which the step statistics (the
	// sums of squared gradients, the feature-normaliser count and the
	// residual scale) are remembered: each update discounts them by
	// 1 - 1/Memory. It bounds how small steps become, so the learner keeps
	// tracking a drifting target however long it runs. Zero means
	// DefaultMemory (20000); negative means never forget, so steps keep
	// shrinking as in plain AdaGrad.
	Memory int
	// Average is the window, in updates, of the exponential moving average
	// of the weights that Predict uses (Polyak-Ruppert averaging with
	// exponential weights); Update always steps from the latest weights.
	// It damps the jitter of single subgradient steps at the cost of a lag
	// of about Average updates after a change. Zero means DefaultAverage
	// (300); negative means no averaging (Predict uses the latest weights).
	Average int
}

// Online is a linear quantile regression learner updated one observation
// at a time: Predict gives x' w for the level tau, Update takes one
// subgradient step of the pinball loss once the outcome is known. The
// forecaster keeps one per (level, lead bucket) and updates it at each
// settlement.
//
// # Step
//
// The pinball subgradient with respect to the prediction is -tau when the
// outcome lies above it and 1 - tau when below, whatever the size of the
// miss. Plain gradient descent therefore needs a learning rate in the
// units of the weights (y units per x unit), which would have to be tuned
// per site and per feature scale. Online removes both scales.
//
// Feature scale: the step of each weight is normalised as in NAG, the
// "normalized adaptive gradient" of Ross, Mineiro and Langford ("Normalized
// online learning", UAI 2013). Per coordinate, s_i is the
// largest |x_i| seen so far (the weight is rescaled by s_i_old/s_i_new when
// it grows) and G_i the sum of squared gradient components (AdaGrad, Duchi,
// Hazan and Singer, JMLR 12, 2011); T counts the updates and N sums
// (x_i/s_i)^2 over coordinates and updates. The step is
//
//	w_i -= eta S sqrt(T/N) g_i / (s_i sqrt(G_i)),  g_i = (dloss/dq) x_i.
//
// Multiplying any feature by a constant c > 0 leaves every prediction
// unchanged (its weight is divided by c).
//
// Outcome scale: S is the running mean of the absolute residual |y - x' w|,
// which carries the unit of y. Multiplying y by c > 0 multiplies every
// weight and prediction by c. This factor is this package's addition to
// NAG, needed because the pinball gradient does not carry the scale of y
// the way the squared-loss gradient does. At the first update S = |y|, so
// the learner reaches the data's scale within a few steps from zero
// weights.
//
// Drift: a parameter-free coin-betting learner (e.g. Orabona and Pal,
// "Coin betting and parameter-free online learning", NeurIPS 2016) would
// adapt to the size of the weights as well, but in its basic form its bet
// is the running mean of past gradients, which turns only as 1/t after a
// change, while the forecaster must follow drifting sites. Online therefore
// keeps NAG and makes it forget: T, N, G_i and S are discounted by
// 1 - 1/Memory per update, so steps stop shrinking after about Memory
// updates. Predict uses an exponential moving average of the weights
// (Polyak and Juditsky, SIAM J. Control Optim. 30(4), 1992, with
// exponential weights) to damp the jitter that non-vanishing steps leave.
//
// The defaults (Rate 1, Memory 20000, Average 300) were chosen on the
// Engel data and a synthetic drifting stream; the tests hold them to the
// summed pinball loss of the exact solution (Fit) on the Engel data, in
// the original units and with income rescaled by 1000 and 0.001, and to
// coverage after a jump of the intercept.
//
// # Contract
//
// Predict and Update take O(p) time and do not allocate. An Update with a
// NaN or infinite element in x, or a NaN or infinite y, is ignored (it
// changes nothing and is not counted); Predict with a NaN in x returns NaN.
// Online is not safe for concurrent use. The zero Online is only a target
// for UnmarshalBinary; use NewOnline.
type Online struct {
	p       int
	tau     float64
	rate    float64
	memory  int64 // > 0, or -1: never forget
	average int64 // > 0, or -1: no averaging
	lambda  float64
	updates int64

	t, n, scale, scaleW float64 // discounted counts and residual sums
	w, avg, s, g        []float64
}

// NewOnline returns a learner of the level tau for feature vectors of
// length p, with all weights zero (it predicts 0 until it has learned).
// It panics if p < 1, tau is not inside (0, 1) or an option is invalid.
func NewOnline(p int, tau float64, o OnlineOptions) *Online {
	if p < 1 {
		panic("qr: NewOnline needs p >= 1")
	}
	if !(tau > 0 && tau < 1) {
		panic("qr: NewOnline needs a level tau inside (0, 1)")
	}
	rate := o.Rate
	switch {
	case rate == 0:
		rate = DefaultRate
	case !(rate > 0) || math.IsInf(rate, 1):
		panic("qr: OnlineOptions.Rate must be positive and finite")
	}
	memory := int64(o.Memory)
	switch {
	case memory == 0:
		memory = DefaultMemory
	case memory < 0:
		memory = -1
	}
	average := int64(o.Average)
	switch {
	case average == 0:
		average = DefaultAverage
	case average < 0:
		average = -1
	}
	m := &Online{p: p, tau: tau, rate: rate, memory: memory, average: average}
	m.alloc()
	m.setLambda()
	return m
}

func (m *Online) alloc() {
	buf := make([]float64, 4*m.p)
	m.w, m.avg, m.s, m.g = buf[:m.p:m.p], buf[m.p:2*m.p:2*m.p], buf[2*m.p:3*m.p:3*m.p], buf[3*m.p:]
}

func (m *Online) setLambda() {
	m.lambda = 1
	if m.memory > 0 {
		m.lambda = 1 - 1/float64(m.memory)
	}
}

// Tau returns the level the learner estimates.
func (m *Online) Tau() float64 { return m.tau }

// Updates returns the number of updates applied (ignored ones excluded).
func (m *Online) Updates() int64 { return m.updates }

// Coef writes the weights that Predict uses to dst and returns it; dst is
// allocated when nil and must otherwise have length p.
func (m *Online) Coef(dst []float64) []float64 {
	if dst == nil {
		dst = make([]float64, m.p)
	}
	if len(dst) != m.p {
		panic(fmt.Sprintf("qr: Coef needs len(dst) = %d, got %d", m.p, len(dst)))
	}
	copy(dst, m.predWeights())
	return dst
}

func (m *Online) predWeights() []float64 {
	if m.average > 0 {
		return m.avg
	}
	return m.w
}

// Weights copies to dst (of length p) the weights Predict uses now:
// Predict(x) is the sum of w[i]*x[i], added in order of i from 0. It
// panics if len(dst) differs from p.
func (m *Online) Weights(dst []float64) {
	if len(dst) != m.p {
		panic(fmt.Sprintf("qr: Weights needs len(dst) = %d, got %d", m.p, len(dst)))
	}
	copy(dst, m.predWeights())
}

// Predict returns the current estimate x' w of the tau-quantile of y given
// x. It panics if len(x) differs from p.
func (m *Online) Predict(x []float64) float64 {
	if len(x) != m.p {
		panic(fmt.Sprintf("qr: Predict needs len(x) = %d, got %d", m.p, len(x)))
	}
	w := m.predWeights()
	q := 0.0
	for i, v := range x {
		q += w[i] * v
	}
	return q
}

// Update takes one pinball-loss subgradient step on the outcome y of the
// features x (see Online). It ignores the observation if y or an element
// of x is NaN or infinite. It panics if len(x) differs from p.
func (m *Online) Update(x []float64, y float64) {
	if len(x) != m.p {
		panic(fmt.Sprintf("qr: Update needs len(x) = %d, got %d", m.p, len(x)))
	}
	if math.IsNaN(y) || math.IsInf(y, 0) {
		return
	}
	for _, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return
		}
	}
	m.updates++

	// Feature normaliser (NAG): keep s_i = max |x_i| and rescale the
	// weights so that past steps count as if taken at the new scale.
	for i, v := range x {
		if a := math.Abs(v); a > m.s[i] {
			if m.s[i] > 0 {
				f := m.s[i] / a
				m.w[i] *= f
				m.avg[i] *= f
			}
			m.s[i] = a
		}
	}
	q := 0.0
	nx := 0.0
	for i, v := range x {
		q += m.w[i] * v
		if m.s[i] > 0 {
			z := v / m.s[i]
			nx += z * z
		}
	}
	r := y - q
	l := m.lambda
	m.t = l*m.t + 1
	m.n = l*m.n + nx
	m.scale = l*m.scale + math.Abs(r)
	m.scaleW = l*m.scaleW + 1

	var d float64 // dloss/dq
	switch {
	case r > 0:
		d = -m.tau
	case r < 0:
		d = 1 - m.tau
	}
	if d != 0 && m.n > 0 {
		f := m.rate * (m.scale / m.scaleW) * math.Sqrt(m.t/m.n)
		for i, v := range x {
			gi := d * v
			m.g[i] = l*m.g[i] + gi*gi
			if gi != 0 {
				m.w[i] -= f * gi / (m.s[i] * math.Sqrt(m.g[i]))
			}
		}
	} else {
		for i := range m.g {
			m.g[i] *= l
		}
	}

	if m.average > 0 {
		a := 1 / float64(m.updates)
		if m.updates > m.average {
			a = 1 / float64(m.average)
		}
		for i := range m.avg {
			m.avg[i] += a * (m.w[i] - m.avg[i])
		}
	}
}
