// Package analog holds an analog ensemble: the quantiles of a new case are
// those of the outcomes of the K past cases whose predictors were closest
// to its own (Delle Monache et al., "Probabilistic weather prediction with
// an analog ensemble", Monthly Weather Review 141, 2013, in its simplest
// form: predictors standardised and weighted alike, one distance over all
// of them, no time window).
//
// It is the alternative to the quantile regression forest that the Stack's
// first layer was chosen against (see model.StackOptions.Learner).
package analog

import (
	"errors"
	"fmt"
	"math"
	"slices"
)

// Options configures Fit. The zero value takes the defaults.
type Options struct {
	// K is the number of analogs; 0 means 60.
	K int
}

// Analogs is a fitted analog ensemble. Quantiles uses scratch space of
// the Analogs: it must not be called from two goroutines at once.
type Analogs struct {
	p, k      int
	mean, inv []float64 // per predictor: mean and 1/sd (0 for a constant one)
	x         []float32 // standardised predictors, row-major; NaN kept
	y         []float64
	// scratch
	z    []float64
	dist []float64 // max-heap of the K nearest distances
	idx  []int32   // their rows
	vals []float64 // their outcomes, sorted
}

// Fit stores the n = len(y) cases of X (row-major, p columns; NaN is a
// missing value) with their outcomes y.
func Fit(X []float64, p int, y []float64, o Options) (*Analogs, error) {
	n := len(y)
	if p <= 0 || n == 0 || len(X) != n*p {
		return nil, fmt.Errorf("analog: %d values for %d rows of %d predictors", len(X), n, p)
	}
	k := o.K
	if k == 0 {
		k = 60
	}
	if k < 1 {
		return nil, errors.New("analog: K below 1")
	}
	a := &Analogs{p: p, k: min(k, n), mean: make([]float64, p), inv: make([]float64, p),
		x: make([]float32, n*p), y: slices.Clone(y), z: make([]float64, p)}
	for j := range p {
		var s, ss float64
		m := 0
		for i := range n {
			if v := X[i*p+j]; !math.IsNaN(v) {
				s += v
				ss += v * v
				m++
			}
		}
		if m == 0 {
			continue
		}
		mu := s / float64(m)
		sd := math.Sqrt(max(0, ss/float64(m)-mu*mu))
		a.mean[j] = mu
		if sd > 1e-12 {
			a.inv[j] = 1 / sd
		}
	}
	for i := range n {
		for j := range p {
			a.x[i*p+j] = float32((X[i*p+j] - a.mean[j]) * a.inv[j])
		}
	}
	return a, nil
}

// missing is the squared distance a predictor missing on either side adds
// (two standardised values that do not correlate differ by 2 in square on
// average).
const missing = 2

// Quantiles writes to dst the quantiles at levels (sorted or not) of the
// outcomes of the K cases nearest to x, read off their empirical
// distribution by linear interpolation (Hyndman and Fan's type 7).
func (a *Analogs) Quantiles(dst, x, levels []float64) {
	for j := range a.p {
		a.z[j] = (x[j] - a.mean[j]) * a.inv[j]
	}
	a.dist, a.idx = a.dist[:0], a.idx[:0]
	n := len(a.y)
	for i := range n {
		row := a.x[i*a.p : (i+1)*a.p]
		d := 0.0
		for j, v := range row {
			w := a.z[j] - float64(v)
			if w != w {
				d += missing
			} else {
				d += w * w
			}
		}
		if len(a.dist) < a.k {
			a.dist, a.idx = append(a.dist, d), append(a.idx, int32(i))
			a.up(len(a.dist) - 1)
		} else if d < a.dist[0] {
			a.dist[0], a.idx[0] = d, int32(i)
			a.down(0)
		}
	}
	a.vals = a.vals[:0]
	for _, i := range a.idx {
		a.vals = append(a.vals, a.y[i])
	}
	slices.Sort(a.vals)
	m := len(a.vals)
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		default:
			h := l * float64(m-1)
			lo := int(h)
			if lo >= m-1 {
				dst[j] = a.vals[m-1]
				continue
			}
			dst[j] = a.vals[lo] + (h-float64(lo))*(a.vals[lo+1]-a.vals[lo])
		}
	}
}

// up and down keep dist a max-heap (ties broken by row, so that the
// analogs chosen do not depend on the order of the scan).
func (a *Analogs) less(i, j int) bool {
	if a.dist[i] != a.dist[j] {
		return a.dist[i] > a.dist[j]
	}
	return a.idx[i] > a.idx[j]
}

func (a *Analogs) swap(i, j int) {
	a.dist[i], a.dist[j] = a.dist[j], a.dist[i]
	a.idx[i], a.idx[j] = a.idx[j], a.idx[i]
}

func (a *Analogs) up(i int) {
	for i > 0 {
		p := (i - 1) / 2
		if !a.less(i, p) {
			return
		}
		a.swap(i, p)
		i = p
	}
}

func (a *Analogs) down(i int) {
	n := len(a.dist)
	for {
		l := 2*i + 1
		if l >= n {
			return
		}
		c := l
		if r := l + 1; r < n && a.less(r, l) {
			c = r
		}
		if !a.less(c, i) {
			return
		}
		a.swap(i, c)
		i = c
	}
}
