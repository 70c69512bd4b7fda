package backtest

import (
	"math"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model/score"
)

// interval names a central prediction interval by the indices of its two
// levels on the grid.
type interval struct {
	nominal float64
	lo, hi  int
}

// centralIntervals returns the 50 %, 80 % and 90 % central intervals whose
// two levels are on the grid.
func centralIntervals(levels []float64) []interval {
	find := func(l float64) int {
		for j, v := range levels {
			if math.Abs(v-l) < 1e-9 {
				return j
			}
		}
		return -1
	}
	var out []interval
	for _, nom := range []float64{0.5, 0.8, 0.9} {
		lo, hi := find((1-nom)/2), find((1+nom)/2)
		if lo >= 0 && hi >= 0 {
			out = append(out, interval{nominal: nom, lo: lo, hi: hi})
		}
	}
	return out
}

// acc accumulates the scores of one cell: one view, one site, one lead
// bucket. The independence test counts transitions within the cell, in the
// order outcomes settle.
type acc struct {
	n     int
	pin   []float64 // per level, summed
	hits  []int
	trans []conformal.TransitionCounts
	prev  []int8 // last miss state per level: -1 none, 0 hit, 1 miss
	ivHit []int
	ivW   []float64
	ivS   []float64
	hit   []bool // scratch of add: the outcome's hit of each level
}

func newAcc(nl, niv int) *acc {
	a := &acc{
		pin: make([]float64, nl), hits: make([]int, nl),
		trans: make([]conformal.TransitionCounts, nl), prev: make([]int8, nl),
		ivHit: make([]int, niv), ivW: make([]float64, niv), ivS: make([]float64, niv),
		hit: make([]bool, nl),
	}
	for j := range a.prev {
		a.prev[j] = -1
	}
	return a
}

// add scores one forecast row q (sorted, at levels) against outcome y; u
// breaks ties at a point mass (conformal.TieHit).
func (a *acc) add(levels, q []float64, ivs []interval, y, u float64) {
	a.n++
	for j, l := range levels {
		a.pin[j] += score.Pinball(q[j], y, l)
		hit := conformal.TieHit(levels, q, j, y, u)
		a.hit[j] = hit
		if hit {
			a.hits[j]++
		}
		miss := int8(1)
		if hit {
			miss = 0
		}
		switch {
		case a.prev[j] < 0:
		case a.prev[j] == 0 && miss == 0:
			a.trans[j].N00++
		case a.prev[j] == 0:
			a.trans[j].N01++
		case miss == 0:
			a.trans[j].N10++
		default:
			a.trans[j].N11++
		}
		a.prev[j] = miss
	}
	for k, iv := range ivs {
		lo, hi := q[iv.lo], q[iv.hi]
		// Inside when the outcome's (randomised) PIT lies between the two
		// levels: at or below the upper quantile and not at or below the
		// lower one, with the ties at a point mass broken as for the levels.
		// Counting lo <= y <= hi instead would put every outcome on an atom
		// the interval touches inside it (a calm hour with both ends at
		// zero): the wind farms' 80 % intervals then covered 85 %.
		if a.hit[iv.hi] && !a.hit[iv.lo] {
			a.ivHit[k]++
		}
		a.ivW[k] += hi - lo
		a.ivS[k] += score.IntervalScore(lo, hi, y, 1-iv.nominal)
	}
}

// merge adds b's sums into a (transitions too; the last states are not
// merged: a merged cell only reports).
func (a *acc) merge(b *acc) {
	a.n += b.n
	for j := range a.pin {
		a.pin[j] += b.pin[j]
		a.hits[j] += b.hits[j]
		a.trans[j].N00 += b.trans[j].N00
		a.trans[j].N01 += b.trans[j].N01
		a.trans[j].N10 += b.trans[j].N10
		a.trans[j].N11 += b.trans[j].N11
	}
	for k := range a.ivHit {
		a.ivHit[k] += b.ivHit[k]
		a.ivW[k] += b.ivW[k]
		a.ivS[k] += b.ivS[k]
	}
}

// scores summarises the cell.
func (a *acc) scores(levels []float64, ivs []interval) Scores {
	nl := len(levels)
	s := Scores{
		N:               a.n,
		PinballByLevel:  make([]float64, nl),
		Coverage:        make([]float64, nl),
		KupiecP:         make([]float64, nl),
		ChristoffersenP: make([]float64, nl),
	}
	for j, l := range levels {
		s.KupiecP[j], s.ChristoffersenP[j] = 1, 1
		if a.n == 0 {
			continue
		}
		s.PinballByLevel[j] = a.pin[j] / float64(a.n)
		s.Pinball += s.PinballByLevel[j] / float64(nl)
		s.Coverage[j] = float64(a.hits[j]) / float64(a.n)
		_, s.KupiecP[j] = conformal.Kupiec(a.n-a.hits[j], a.n, 1-l)
		_, s.ChristoffersenP[j] = a.trans[j].Test()
	}
	s.CRPS = 2 * s.Pinball
	for k, iv := range ivs {
		out := Interval{Nominal: iv.nominal, Lower: levels[iv.lo], Upper: levels[iv.hi]}
		if a.n > 0 {
			out.Coverage = float64(a.ivHit[k]) / float64(a.n)
			out.Width = a.ivW[k] / float64(a.n)
			out.Score = a.ivS[k] / float64(a.n)
		}
		s.Intervals = append(s.Intervals, out)
	}
	return s
}

// trade accumulates the trading value of one site in one view.
type trade struct {
	energy, costMed, costOpt float64
}

// add prices one forecast: bid the median, or the quantile at the critical
// level, of the row q (interpolated on the grid) for an interval of the
// given length in minutes.
func (t *trade) add(levels, q []float64, y float64, minutes int, c Costs) {
	h := float64(minutes) / 60
	cost := func(bid float64) float64 {
		return h * (c.Short*math.Max(bid-y, 0) + c.Long*math.Max(y-bid, 0))
	}
	t.energy += y * h
	t.costMed += cost(quantileAt(levels, q, 0.5))
	t.costOpt += cost(quantileAt(levels, q, c.CriticalLevel))
}

func (t *trade) report() Trading {
	r := Trading{EnergyMWh: t.energy, CostMedian: t.costMed, CostOptimal: t.costOpt}
	if t.costMed > 0 {
		r.Saving = 1 - t.costOpt/t.costMed
	}
	return r
}

// quantileAt interpolates a sorted row of quantiles linearly in the level;
// outside the grid it holds the end values.
func quantileAt(levels, q []float64, l float64) float64 {
	n := len(levels)
	if l <= levels[0] {
		return q[0]
	}
	if l >= levels[n-1] {
		return q[n-1]
	}
	for j := 1; j < n; j++ {
		if l <= levels[j] {
			w := (l - levels[j-1]) / (levels[j] - levels[j-1])
			return q[j-1] + w*(q[j]-q[j-1])
		}
	}
	return q[n-1]
}

// weekStart returns the Monday 00:00 UTC of t's week.
func weekStart(t time.Time) time.Time {
	t = t.UTC()
	d := (int(t.Weekday()) + 6) % 7 // Monday = 0
	y, m, day := t.Date()
	return time.Date(y, m, day-d, 0, 0, 0, 0, time.UTC)
}
