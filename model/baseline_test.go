package model

import (
	"math"
	"math/rand/v2"
	"sort"
	"testing"
	"time"

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

// TestBaselineProfileFollowsSeason: where no weather run reaches, the
// baseline forecasts from the site's mean output at the time of day, an
// exponentially weighted mean with a half-life of ProfileHalfLife days
// (14 by default). After 100 days at 0.2 of capacity at 08:00 and 14 at
// 0.6 (a season's change, exaggerated), the estimate for 08:00 is
// 0.2 + 0.4 (1 - (1 - ln2/14)^14) = 0.4035 (the rule's own sum, by hand);
// with the curve's 200-day half-life it used before, the plain mean of the
// 114 days, 0.249.
func TestBaselineProfileFollowsSeason(t *testing.T) {
	for _, c := range []struct {
		halfLife, want float64
	}{
		{0, 0.2 + 0.4*(1-math.Pow(1-math.Ln2/14, 14))},
		// 1/n outweighs ln2/200 for the first 288 days: the plain mean.
		{200, (100*0.2 + 14*0.6) / 114},
	} {
		b := NewBaseline(KindPV, BaselineOptions{ProfileHalfLife: c.halfLife})
		day0 := time.Date(2026, 1, 1, 8, 0, 0, 0, time.UTC)
		x := Features{ValidMinutes: 60, LeadMinutes: 180, CapacityMW: 1, Availability: 1,
			Driver: math.NaN(), LastPowerMW: math.NaN()}
		for d := range 114 {
			x.ValidStart = day0.AddDate(0, 0, d)
			y := 0.2
			if d >= 100 {
				y = 0.6
			}
			b.Learn(y, []*Features{&x})
		}
		x.ValidStart = day0.AddDate(0, 0, 114)
		if got := b.estimate(&x); math.Abs(got-c.want) > 1e-9 {
			t.Errorf("half-life %v: estimate %.6f, want %.6f", c.halfLife, got, c.want)
		}
		t.Logf("half-life %v: estimate %.4f after 14 days at the new level", c.halfLife, c.want)
	}
}
