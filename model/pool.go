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

// ringIndex is the type of a ring index in a sortedRing's order.
type ringIndex interface{ ~uint16 | ~uint32 }

// maxRing16 is the largest window a sortedRing[uint16] holds.
const maxRing16 = 1 << 16

// sortedRing is the window of residualPool kept more compactly: the values
// in arrival order (a ring) as float32 and, instead of a sorted copy of
// them, their ring indices in increasing order of value. With uint16
// indices a value takes 6 bytes instead of 16. The values are residuals
// per unit of capacity (|r| of order 1), which float32 holds to about 1e-7
// of capacity, far below any meter's resolution. Its quantile is
// residualPool's given the values rounded to float32: the values read are
// the same, in the same order. (Which of equal values an order position
// points to can differ, so a zero can come out with the other sign; no
// caller tells them apart.)
type sortedRing[I ringIndex] struct {
	ring  []float32 // arrival order; the oldest is ring[head]
	head  int
	order []I // ring indices of the values held, by increasing value
}

func newSortedRing[I ringIndex](n int) sortedRing[I] {
	return sortedRing[I]{ring: make([]float32, n), order: make([]I, 0, n)}
}

func (p *sortedRing[I]) len() int { return len(p.order) }

// quantile is residualPool.quantile: type 7 of Hyndman and Fan (1996). The
// ring must not be empty.
func (p *sortedRing[I]) quantile(l float64) float64 {
	n := len(p.order)
	h := l * float64(n-1)
	i := int(h)
	if i >= n-1 {
		return float64(p.ring[p.order[n-1]])
	}
	lo, hi := float64(p.ring[p.order[i]]), float64(p.ring[p.order[i+1]])
	return lo + (h-float64(i))*(hi-lo)
}

// search returns the first position in order whose value is at or above v
// (sort.SearchFloat64s on the sorted values).
func (p *sortedRing[I]) search(v float32) int {
	lo, hi := 0, len(p.order)
	for lo < hi {
		m := int(uint(lo+hi) >> 1)
		if p.ring[p.order[m]] >= v {
			hi = m
		} else {
			lo = m + 1
		}
	}
	return lo
}

// add appends r (which must not be NaN), rounded to float32, dropping the
// oldest value first if the ring is full.
func (p *sortedRing[I]) add(r float64) {
	if len(p.order) == len(p.ring) {
		p.dropOldest()
	}
	at := (p.head + len(p.order)) % len(p.ring)
	v := float32(r)
	p.ring[at] = v
	i := p.search(v)
	p.order = append(p.order, 0)
	copy(p.order[i+1:], p.order[i:])
	p.order[i] = I(at)
}

// dropOldest removes the oldest value; the ring must not be empty.
func (p *sortedRing[I]) dropOldest() {
	// Values equal to the oldest sit together from search(old) on; one of
	// them is the oldest itself.
	i := p.search(p.ring[p.head])
	for p.order[i] != I(p.head) {
		i++
	}
	copy(p.order[i:], p.order[i+1:])
	p.order = p.order[:len(p.order)-1]
	p.head++
	if p.head == len(p.ring) {
		p.head = 0
	}
}
