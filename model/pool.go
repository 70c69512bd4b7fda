package model

import "sort"

// residualPool is a fixed-size window of values (residuals, errors or
// outcomes) kept both in arrival order (a ring) and sorted, so a quantile
// costs O(1) and an update O(n). When full, adding a value drops the oldest;
// the oldest can also be dropped on its own (dropOldest), which lets a caller
// bound the window by age as well as by count.
type residualPool struct {
	ring   []float64 // arrival order; the oldest is ring[head]
	head   int
	sorted []float64 // the same values, increasing
}

func newResidualPool(n int) residualPool {
	return residualPool{ring: make([]float64, n), sorted: make([]float64, 0, n)}
}

func (p *residualPool) len() int { return len(p.sorted) }

// quantile returns the empirical quantile at level l in (0, 1) by linear
// interpolation between order statistics: type 7 of Hyndman and Fan (1996),
// the default of R and NumPy. O(1): the pool is kept sorted. The pool must
// not be empty.
func (p *residualPool) quantile(l float64) float64 {
	x := p.sorted
	h := l * float64(len(x)-1)
	i := int(h)
	if i >= len(x)-1 {
		return x[len(x)-1]
	}
	return x[i] + (h-float64(i))*(x[i+1]-x[i])
}

// add appends r (which must not be NaN), dropping the oldest value first if
// the pool is full, and returns the ring index r was stored at.
func (p *residualPool) add(r float64) int {
	if len(p.sorted) == len(p.ring) {
		p.dropOldest()
	}
	at := (p.head + len(p.sorted)) % len(p.ring)
	p.ring[at] = r
	i := sort.SearchFloat64s(p.sorted, r)
	p.sorted = append(p.sorted, 0)
	copy(p.sorted[i+1:], p.sorted[i:])
	p.sorted[i] = r
	return at
}

// oldest returns the ring index of the oldest value; the pool must not be
// empty.
func (p *residualPool) oldest() int { return p.head }

// dropOldest removes the oldest value; the pool must not be empty.
func (p *residualPool) dropOldest() {
	old := p.ring[p.head]
	i := sort.SearchFloat64s(p.sorted, old)
	copy(p.sorted[i:], p.sorted[i+1:])
	p.sorted = p.sorted[:len(p.sorted)-1]
	p.head++
	if p.head == len(p.ring) {
		p.head = 0
	}
}
