package backtest

import (
	"testing"
)

// TestIntervalCoverageTies holds the central intervals' coverage to the
// randomised PIT the levels use (conformal.TieHit; Czado, Gneiting and
// Held, Biometrics 65, 2009): an outcome on a point mass of the forecast
// (here a calm hour: the 0.1 and 0.5 quantiles both zero, the outcome
// zero) has its PIT uniform over [0, 0.5], so it lies inside the 80 %
// interval (0.1, 0.9] for 0.8 of the draws, not for all of them. Away from
// ties the interval is (lower quantile, upper quantile].
func TestIntervalCoverageTies(t *testing.T) {
	levels := []float64{0.1, 0.25, 0.5, 0.75, 0.9}
	ivs := centralIntervals(levels)
	if len(ivs) != 2 || ivs[1].nominal != 0.8 {
		t.Fatalf("intervals %+v", ivs)
	}
	const n = 1000
	a := newAcc(len(levels), len(ivs))
	q := []float64{0, 0, 0, 2, 3}
	for i := range n {
		a.add(levels, q, ivs, 0, (float64(i)+0.5)/n)
	}
	// PIT = 0.5 u: inside the 80 % interval when 0.1 < 0.5 u, u > 0.2;
	// inside the 50 % one (0.25, 0.75] when u > 0.5.
	if got := a.ivHit[1]; got != 800 {
		t.Errorf("80 %% interval: %d of %d outcomes on the atom inside, want 800", got, n)
	}
	if got := a.ivHit[0]; got != 500 {
		t.Errorf("50 %% interval: %d of %d outcomes on the atom inside, want 500", got, n)
	}
	for _, c := range []struct {
		y      float64
		inside bool
	}{{1, true}, {3, true}, {3.5, false}, {-1, false}} {
		b := newAcc(len(levels), len(ivs))
		b.add(levels, []float64{0.5, 1, 1.5, 2, 3}, ivs, c.y, 0.3)
		if got := b.ivHit[1] == 1; got != c.inside {
			t.Errorf("outcome %v: inside the 80 %% interval %v, want %v", c.y, got, c.inside)
		}
	}
}
