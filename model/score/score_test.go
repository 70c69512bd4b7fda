package score

import (
	"encoding/csv"
	"errors"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"math"
	"os"
	"strconv"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

func TestPinball(t *testing.T) {
	cases := []struct {
		name      string
		q, y, tau float64
		want      float64
	}{
		// METHODS.md section 3: tau (y - q) when y >= q, (1 - tau)(q - y) otherwise.
		{"METHODS.md s3 outcome above", 2, 5, 0.9, 2.7},
		{"METHODS.md s3 outcome below", 2, -1, 0.9, 0.3},
		{"METHODS.md s3 outcome on the quantile", 2, 2, 0.3, 0},
		{"median is half the absolute error", 1, 4, 0.5, 1.5},
		{"level 0 ignores outcomes above", 1, 10, 0, 0},
		{"level 1 ignores outcomes below", 1, -10, 1, 0},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := Pinball(c.q, c.y, c.tau); !near(got, c.want, 1e-12) {
				t.Errorf("Pinball(%v, %v, %v) = %v, want %v", c.q, c.y, c.tau, got, c.want)
			}
		})
	}
	if got := Pinball(math.NaN(), 1, 0.5); !math.IsNaN(got) {
		t.Errorf("Pinball with a NaN quantile = %v, want NaN", got)
	}
}

// TestPinballMinimisedAtQuantile: over a sample, the summed pinball loss at
// level tau is smallest at the sample's tau-quantile (the property quantile
// regression rests on, METHODS.md section 3).
func TestPinballMinimisedAtQuantile(t *testing.T) {
	ys := []float64{3, 1, 4, 1, 5, 9, 2, 6, 5, 3} // sorted: 1 1 2 3 3 4 5 5 6 9
	loss := func(q, tau float64) float64 {
		var s float64
		for _, y := range ys {
			s += Pinball(q, y, tau)
		}
		return s
	}
	for _, c := range []struct {
		tau, best float64
	}{{0.25, 2}, {0.5, 3.5}, {0.85, 6}} {
		at := loss(c.best, c.tau)
		for q := -1.0; q <= 11; q += 0.25 {
			if l := loss(q, c.tau); l < at-1e-12 {
				t.Errorf("tau %v: loss %v at q = %v is below %v at the sample quantile %v", c.tau, l, q, at, c.best)
			}
		}
	}
}

func TestMeanPinballAndPanics(t *testing.T) {
	if got := MeanPinball([]float64{0, 2}, []float64{0.1, 0.9}, 1); !near(got, (0.1*1+0.1*1)/2, 1e-15) {
		t.Errorf("MeanPinball = %v, want 0.1", got)
	}
	cases := []struct {
		name string
		fn   func()
	}{
		{"lengths differ", func() { MeanPinball([]float64{1}, []float64{0.1, 0.2}, 0) }},
		{"empty", func() { MeanPinball(nil, nil, 0) }},
		{"level above 1", func() { Pinball(0, 0, 1.5) }},
		{"NaN level", func() { Pinball(0, 0, math.NaN()) }},
		{"negative sigma", func() { CRPSNormal(0, -1, 0) }},
		{"alpha 0", func() { IntervalScore(0, 1, 0, 0) }},
		{"alpha 1", func() { IntervalScore(0, 1, 0, 1) }},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("no panic")
				}
			}()
			c.fn()
		})
	}
}

// TestCRPSNormalMethodsChecks holds the closed form to METHODS.md section 5
// (Gneiting et al., Monthly Weather Review 133, 2005) [paper; computed].
func TestCRPSNormalMethodsChecks(t *testing.T) {
	cases := []struct {
		name         string
		mu, sigma, y float64
		want         float64
	}{
		{"METHODS.md s5 Gneiting 2005 N(0,1) y=-3", 0, 1, -3, 2.43657473},
		{"METHODS.md s5 Gneiting 2005 N(0,1) y=0", 0, 1, 0, 0.23369498},
		{"METHODS.md s5 Gneiting 2005 N(0,1) y=1", 0, 1, 1, 0.60244136},
		{"METHODS.md s5 Gneiting 2005 N(0,1) y=2", 0, 1, 2, 1.45279182},
		{"METHODS.md s5 Gneiting 2005 N(0,2^2) y=1", 0, 2, 1, 0.66280706},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := CRPSNormal(c.mu, c.sigma, c.y); !near(got, c.want, 5e-9) {
				t.Errorf("CRPSNormal(%v, %v, %v) = %.9f, want %v", c.mu, c.sigma, c.y, got, c.want)
			}
		})
	}
	// Location invariance and the point-forecast limit.
	if a, b := CRPSNormal(5, 1.5, 6), CRPSNormal(0, 1.5, 1); !near(a, b, 1e-12) {
		t.Errorf("CRPS is not shift invariant: %v vs %v", a, b)
	}
	if got := CRPSNormal(1, 0, -2); got != 3 {
		t.Errorf("CRPS of a point forecast = %v, want |y - mu| = 3", got)
	}
	if got := CRPSNormal(1, 1e-9, -2); !near(got, 3, 1e-8) {
		t.Errorf("CRPS as sigma -> 0 = %v, want 3", got)
	}
}

// normalGrid returns the quantiles of N(0, 1) at the levels 1/n..(n-1)/n,
// from gonum's distuv.Normal.
func normalGrid(n int) (q, levels []float64) {
	for i := 1; i < n; i++ {
		tau := float64(i) / float64(n)
		levels = append(levels, tau)
		q = append(q, distuv.UnitNormal.Quantile(tau))
	}
	return q, levels
}

// TestCRPSQuantilesMethodsChecks: 2 x mean pinball over the 99 quantiles
// 0.01..0.99 of N(0, 1), METHODS.md section 5 [computed].
func TestCRPSQuantilesMethodsChecks(t *testing.T) {
	q, levels := normalGrid(100)
	cases := []struct {
		name string
		y    float64
		want float64
	}{
		{"METHODS.md s5 99 quantiles of N(0,1) y=0", 0, 0.235912},
		{"METHODS.md s5 99 quantiles of N(0,1) y=1", 1, 0.608405},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := CRPSQuantiles(q, levels, c.y); !near(got, c.want, 5e-7) {
				t.Errorf("CRPSQuantiles at y = %v: %.7f, want %v", c.y, got, c.want)
			}
		})
	}
}

// TestCRPSQuantilesConverges: on finer even grids the approximation tends
// to the closed form.
func TestCRPSQuantilesConverges(t *testing.T) {
	for _, y := range []float64{-3, 0, 1, 2} {
		exact := CRPSNormal(0, 1, y)
		prev := math.Inf(1)
		for _, n := range []int{10, 100, 1000, 10000} {
			q, levels := normalGrid(n)
			errN := math.Abs(CRPSQuantiles(q, levels, y) - exact)
			if errN >= prev {
				t.Errorf("y = %v: error %v with %d levels is not below %v", y, errN, n-1, prev)
			}
			prev = errN
		}
		if prev > 1e-3 {
			t.Errorf("y = %v: error %v with 9999 levels", y, prev)
		}
	}
}

// TestIntervalScoreMethodsChecks: [0, 10], alpha = 0.1, METHODS.md section 5
// [computed].
func TestIntervalScoreMethodsChecks(t *testing.T) {
	cases := []struct {
		name string
		y    float64
		want float64
	}{
		{"METHODS.md s5 [0,10] alpha=0.1 y=5", 5, 10},
		{"METHODS.md s5 [0,10] alpha=0.1 y=12", 12, 50},
		{"METHODS.md s5 [0,10] alpha=0.1 y=-1", -1, 30},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := IntervalScore(0, 10, c.y, 0.1); !near(got, c.want, 1e-12) {
				t.Errorf("IntervalScore(0, 10, %v, 0.1) = %v, want %v", c.y, got, c.want)
			}
		})
	}
	// The interval score is the summed pinball losses of its two ends
	// scaled by 2/alpha: IS = (2/alpha)(rho_{alpha/2}(l, y) + rho_{1-alpha/2}(u, y)).
	for _, y := range []float64{-3, 0, 4, 10, 11.5} {
		want := 2 / 0.2 * (Pinball(0, y, 0.1) + Pinball(10, y, 0.9))
		if got := IntervalScore(0, 10, y, 0.2); !near(got, want, 1e-12) {
			t.Errorf("y = %v: interval score %v, pinball form %v", y, got, want)
		}
	}
}

// TestEngelSummedPinball holds the summed pinball loss of the published
// quantile regression fits of foodexp ~ income on the Engel data to
// METHODS.md section 3 [paper: R quantreg documentation; computed]. The
// coefficients are printed to 5 decimals, so the sums are held to 0.01.
func TestEngelSummedPinball(t *testing.T) {
	f, err := os.Open(sharedtest.Data(t, "reference/engel.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != 236 || rows[0][0] != "income" || rows[0][1] != "foodexp" {
		t.Fatalf("engel.csv: %d rows, header %v; want 235 households under income,foodexp", len(rows), rows[0])
	}
	var income, food []float64
	for _, r := range rows[1:] {
		x, err1 := strconv.ParseFloat(r[0], 64)
		y, err2 := strconv.ParseFloat(r[1], 64)
		if err := errors.Join(err1, err2); err != nil {
			t.Fatalf("engel.csv: %v", err)
		}
		income, food = append(income, x), append(food, y)
	}
	cases := []struct {
		name            string
		tau, a, b, want float64
	}{
		{"METHODS.md s3 quantreg tau=0.05", 0.05, 124.88004, 0.34336, 2174.3173},
		{"METHODS.md s3 quantreg tau=0.25", 0.25, 95.48354, 0.47410, 7082.3159},
		{"METHODS.md s3 quantreg tau=0.50", 0.50, 81.48225, 0.56018, 8779.9663},
		{"METHODS.md s3 quantreg tau=0.75", 0.75, 62.39659, 0.64401, 6529.2503},
		{"METHODS.md s3 quantreg tau=0.95", 0.95, 64.10396, 0.70907, 1900.2442},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var sum float64
			for i, x := range income {
				sum += Pinball(c.a+c.b*x, food[i], c.tau)
			}
			if !near(sum, c.want, 0.01) {
				t.Errorf("summed pinball loss %.4f, want %v", sum, c.want)
			}
		})
	}
}
