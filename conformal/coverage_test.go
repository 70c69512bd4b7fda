package conformal

import (
	"math"
	"testing"
)

// near reports whether got is within tol of want.
func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

// TestKupiecMethodsChecks holds Kupiec to the check values of METHODS.md
// section 5 [computed]. Tolerances are half a unit of the last digit given.
func TestKupiecMethodsChecks(t *testing.T) {
	cases := []struct {
		name     string
		x, n     int
		p        float64
		lr, lrTo float64
		pv, pvTo float64 // NaN: no published p-value
	}{
		{"METHODS.md s5 x=20 T=250 p=0.05", 20, 250, 0.05, 4.039520, 5e-7, 0.0444, 5e-5},
		{"METHODS.md s5 x=65 T=500 p=0.1", 65, 500, 0.1, 4.6130, 5e-5, math.NaN(), 0},
		{"METHODS.md s5 x=0 T=250 p=0.01", 0, 250, 0.01, 5.025168, 5e-7, math.NaN(), 0},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			lr, pv := Kupiec(c.x, c.n, c.p)
			if !near(lr, c.lr, c.lrTo) {
				t.Errorf("LR = %.7f, want %v", lr, c.lr)
			}
			if !math.IsNaN(c.pv) && !near(pv, c.pv, c.pvTo) {
				t.Errorf("p-value = %.6f, want %v", pv, c.pv)
			}
			// METHODS.md section 5: chi2_1 sf(x) = erfc(sqrt(x/2)).
			if want := math.Erfc(math.Sqrt(lr / 2)); !near(pv, want, 1e-12) {
				t.Errorf("p-value %v differs from erfc(sqrt(LR/2)) = %v", pv, want)
			}
		})
	}
}

// TestKupiecEdges covers x = 0 and x = T (0 ln 0 = 0) and the 5 % critical
// value 3.841 of METHODS.md section 5.
func TestKupiecEdges(t *testing.T) {
	// x = T: LR = -2 T ln p, by the formula with 0 ln 0 = 0.
	lr, pv := Kupiec(40, 40, 0.5)
	if want := -2 * 40 * math.Log(0.5); !near(lr, want, 1e-9) {
		t.Errorf("x = T: LR = %v, want %v", lr, want)
	}
	if math.IsNaN(pv) || pv < 0 || pv > 1e-6 {
		t.Errorf("x = T: p-value %v, want a tiny probability", pv)
	}
	// x/T equal to p: LR = 0, p-value 1.
	if lr, pv := Kupiec(25, 250, 0.1); !near(lr, 0, 1e-9) || !near(pv, 1, 1e-9) {
		t.Errorf("x/T = p: (LR, p-value) = (%v, %v), want (0, 1)", lr, pv)
	}
	// The chi-square(1) 5 % critical value 3.841 (METHODS.md section 5).
	if pv := chiSquare1Survival(3.841); !near(pv, 0.05, 1e-4) {
		t.Errorf("sf(3.841) = %v, want 0.05", pv)
	}
}

func TestKupiecPanicsOnMisuse(t *testing.T) {
	cases := []struct {
		name string
		x, n int
		p    float64
	}{
		{"no samples", 0, 0, 0.1},
		{"negative misses", -1, 10, 0.1},
		{"more misses than samples", 11, 10, 0.1},
		{"p = 0", 1, 10, 0},
		{"p = 1", 1, 10, 1},
		{"p NaN", 1, 10, math.NaN()},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("Kupiec did not panic")
				}
			}()
			Kupiec(c.x, c.n, c.p)
		})
	}
}

// missAt returns a sequence of n hits with misses at the given 1-based days.
func missAt(n int, days ...int) []bool {
	s := make([]bool, n)
	for _, d := range days {
		s[d-1] = true
	}
	return s
}

// TestChristoffersenMethodsChecks holds the independence test to the check
// values of METHODS.md section 5 [computed].
func TestChristoffersenMethodsChecks(t *testing.T) {
	cases := []struct {
		name   string
		miss   []bool
		counts TransitionCounts
		lr     float64
		tol    float64
	}{
		{"METHODS.md s5 245 zeros then 5 ones", missAt(250, 246, 247, 248, 249, 250),
			TransitionCounts{N00: 244, N01: 1, N10: 0, N11: 4}, 35.9806, 5e-5},
		{"METHODS.md s5 misses at days 10 50 100 150 200 of 250", missAt(250, 10, 50, 100, 150, 200),
			TransitionCounts{N00: 239, N01: 5, N10: 5, N11: 0}, 0.20493, 5e-6},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			lr, pv, counts := Christoffersen(c.miss)
			if counts != c.counts {
				t.Errorf("counts %+v, want %+v", counts, c.counts)
			}
			if !near(lr, c.lr, c.tol) {
				t.Errorf("LR_ind = %.6f, want %v", lr, c.lr)
			}
			if want := math.Erfc(math.Sqrt(lr / 2)); !near(pv, want, 1e-12) {
				t.Errorf("p-value %v differs from erfc(sqrt(LR/2)) = %v", pv, want)
			}
		})
	}
}

func TestChristoffersenEdges(t *testing.T) {
	cases := []struct {
		name string
		miss []bool
	}{
		{"empty", nil},
		{"one sample", []bool{true}},
		{"all hits", make([]bool, 100)},
		{"all misses", missAt(3, 1, 2, 3)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			lr, pv, _ := Christoffersen(c.miss)
			if lr != 0 || pv != 1 {
				t.Errorf("(LR, p-value) = (%v, %v), want (0, 1): a constant sequence says nothing about dependence", lr, pv)
			}
		})
	}
}
