package model

import (
	"math"
	"math/rand/v2"
	"sort"
	"testing"

	"gonum.org/v1/gonum/stat"
)

// TestResidualPoolQuantile checks the pool's sorted window against a fresh
// sort of the same window, and its quantile against Hyndman and Fan type 7
// computed independently (gonum's empirical CDF brackets it).
func TestResidualPoolQuantile(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	p := newResidualPool(50)
	var all []float64
	for i := 0; i < 500; i++ {
		v := rng.NormFloat64()
		p.add(v)
		all = append(all, v)
		win := append([]float64(nil), all[max(0, len(all)-50):]...)
		sort.Float64s(win)
		for k := range win {
			if win[k] != p.sorted[k] {
				t.Fatalf("step %d: sorted window differs at %d", i, k)
			}
		}
	}
	x := p.sorted
	for _, l := range []float64{0.01, 0.05, 0.5, 0.9, 0.99} {
		got := p.quantile(l)
		// Type 7 lies between the empirical quantiles at the neighbouring
		// order statistics.
		lo := stat.Quantile(math.Floor(l*float64(len(x)-1))/float64(len(x)), stat.Empirical, x, nil)
		hi := x[min(len(x)-1, int(math.Ceil(l*float64(len(x)-1))))]
		if got < lo-1e-12 || got > hi+1e-12 {
			t.Fatalf("level %v: %v outside [%v, %v]", l, got, lo, hi)
		}
	}
	// The 0.5 quantile of an even window is the mean of the middle pair.
	if want := (x[24] + x[25]) / 2; math.Abs(p.quantile(0.5)-want) > 1e-12 {
		t.Fatalf("median %v, want %v", p.quantile(0.5), want)
	}
}

func TestBaselineQuantilesEdges(t *testing.T) {
	b := NewBaseline(KindWind, BaselineOptions{})
	x := Features{CapacityMW: 10, Availability: 1, Driver: 8, LastPowerMW: math.NaN()}
	dst := make([]float64, 4)
	b.Quantiles(dst, &x, []float64{-0.1, 0.2, 0.8, 1})
	if !math.IsInf(dst[0], -1) || !math.IsInf(dst[3], 1) {
		t.Fatalf("levels at or beyond 0 and 1: %v, want -Inf and +Inf", dst)
	}
	// Without residuals: uniform over [0, capacity].
	if dst[1] != 2 || dst[2] != 8 {
		t.Fatalf("no data: %v, want 2 and 8 (uniform over 0..10)", dst[1:3])
	}
}
