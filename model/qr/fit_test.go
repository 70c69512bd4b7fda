package qr

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/optimize/convex/lp"

	"github.com/plumb-forecast/plumb/model/score"
)

// engelTable is the table of METHODS.md section 3 (R quantreg documentation;
// Koenker and Bassett 1978): foodexp ~ income on the Engel data.
var engelTable = []struct {
	tau, intercept, slope, loss float64
}{
	{0.05, 124.88004, 0.34336, 2174.3173}, // METHODS.md section 3, quantreg docs
	{0.25, 95.48354, 0.47410, 7082.3159},  // METHODS.md section 3, quantreg docs
	{0.50, 81.48225, 0.56018, 8779.9663},  // METHODS.md section 3, quantreg docs
	{0.75, 62.39659, 0.64401, 6529.2503},  // METHODS.md section 3, quantreg docs
	{0.95, 64.10396, 0.70907, 1900.2442},  // METHODS.md section 3, quantreg docs
}

// TestFitEngelMethodsTableKoenkerBassett1978 checks Fit against METHODS.md
// section 3 (R quantreg documentation, Koenker and Bassett 1978):
// coefficients to 1e-4, summed pinball loss to 1e-3.
func TestFitEngelMethodsTableKoenkerBassett1978(t *testing.T) {
	income, food := engel(t)
	X := design(income)
	for _, c := range engelTable {
		beta, loss, err := Fit(X, 2, food, c.tau)
		if err != nil {
			t.Fatalf("tau %v: %v", c.tau, err)
		}
		t.Logf("tau %.2f: intercept %.6f slope %.8f loss %.5f", c.tau, beta[0], beta[1], loss)
		if math.Abs(beta[0]-c.intercept) > 1e-4 || math.Abs(beta[1]-c.slope) > 1e-4 {
			t.Errorf("tau %v: beta = %v, want [%v %v] (METHODS.md section 3)", c.tau, beta, c.intercept, c.slope)
		}
		if math.Abs(loss-c.loss) > 1e-3 {
			t.Errorf("tau %v: loss = %v, want %v (METHODS.md section 3)", c.tau, loss, c.loss)
		}
	}
}

// TestEngelDataOLSKoenkerBassett1978 is a side check that the data file is
// the published one: ordinary least squares of foodexp on income gives
// 147.4754, 0.4851784 (METHODS.md section 3, R quantreg documentation).
func TestEngelDataOLSKoenkerBassett1978(t *testing.T) {
	income, food := engel(t)
	var b mat.VecDense
	if err := b.SolveVec(mat.NewDense(len(food), 2, design(income)), mat.NewVecDense(len(food), food)); err != nil {
		t.Fatal(err)
	}
	if math.Abs(b.AtVec(0)-147.4754) > 1e-4 || math.Abs(b.AtVec(1)-0.4851784) > 1e-7 {
		t.Errorf("OLS = [%v %v], want [147.4754 0.4851784] (METHODS.md section 3)", b.AtVec(0), b.AtVec(1))
	}
}

// bestPair returns the smallest summed pinball loss over all lines through
// two data points of (x, y): for a full-rank design an optimum lies on such
// a line (a vertex of the linear programme), so this is an exhaustive
// reference, as in METHODS.md section 3 ("computed: an exhaustive search
// over data-point pairs gives the same").
func bestPair(x, y []float64, tau float64) (a, b, loss float64) {
	loss = math.Inf(1)
	for i := range x {
		for j := i + 1; j < len(x); j++ {
			if x[i] == x[j] {
				continue
			}
			bb := (y[j] - y[i]) / (x[j] - x[i])
			aa := y[i] - bb*x[i]
			l := 0.0
			for k := range x {
				l += score.Pinball(aa+bb*x[k], y[k], tau)
			}
			if l < loss {
				a, b, loss = aa, bb, l
			}
		}
	}
	return a, b, loss
}

// TestFitEngelExhaustivePairsMethodsSection3 holds Fit to the exhaustive
// search over data-point pairs (METHODS.md section 3, computed), at more
// levels than the published table.
func TestFitEngelExhaustivePairsMethodsSection3(t *testing.T) {
	income, food := engel(t)
	X := design(income)
	for _, tau := range []float64{0.01, 0.05, 0.1, 0.33, 0.5, 0.9, 0.99} {
		a, b, want := bestPair(income, food, tau)
		beta, loss, err := Fit(X, 2, food, tau)
		if err != nil {
			t.Fatalf("tau %v: %v", tau, err)
		}
		if math.Abs(loss-want) > 1e-9*want {
			t.Errorf("tau %v: loss %v, exhaustive search %v", tau, loss, want)
		}
		if math.Abs(beta[0]-a) > 1e-6 || math.Abs(beta[1]-b) > 1e-9 {
			t.Logf("tau %v: beta %v, exhaustive search [%v %v] (tie between optima?)", tau, beta, a, b)
		}
	}
}

// simplexLoss solves the same linear programme with gonum's dense simplex
// (an independent implementation) and returns the optimal summed loss.
func simplexLoss(t *testing.T, X []float64, p int, y []float64, tau float64) float64 {
	t.Helper()
	n := len(y)
	A := mat.NewDense(n, 2*p+2*n, nil)
	c := make([]float64, 2*p+2*n)
	for i := 0; i < n; i++ {
		for j := 0; j < p; j++ {
			A.Set(i, j, X[i*p+j])
			A.Set(i, p+j, -X[i*p+j])
		}
		A.Set(i, 2*p+i, 1)
		A.Set(i, 2*p+n+i, -1)
		c[2*p+i] = tau
		c[2*p+n+i] = 1 - tau
	}
	opt, _, err := lp.Simplex(c, A, y, 1e-10, nil)
	if err != nil {
		t.Fatalf("gonum simplex: %v", err)
	}
	return opt
}

// TestFitMatchesGonumSimplex compares Fit with gonum's simplex on invented
// problems with continuous data.
func TestFitMatchesGonumSimplex(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 11))
	type problem struct {
		name string
		X, y []float64
		p    int
	}
	var probs []problem
	for k := 0; k < 4; k++ {
		n, p := 30+10*k, 1+k
		X := make([]float64, n*p)
		y := make([]float64, n)
		for i := 0; i < n; i++ {
			X[i*p] = 1
			for j := 1; j < p; j++ {
				X[i*p+j] = rng.NormFloat64() * math.Pow(10, float64(j))
			}
			y[i] = 3 + rng.ExpFloat64()*5
			for j := 1; j < p; j++ {
				y[i] += X[i*p+j] * 0.1
			}
		}
		probs = append(probs, problem{"continuous p" + string(rune('0'+p)), X, y, p})
	}
	for _, pr := range probs {
		for _, tau := range []float64{0.05, 0.5, 0.8} {
			want := simplexLoss(t, pr.X, pr.p, pr.y, tau)
			_, loss, err := Fit(pr.X, pr.p, pr.y, tau)
			if err != nil {
				t.Fatalf("%s tau %v: %v", pr.name, tau, err)
			}
			if math.Abs(loss-want) > 1e-8*(1+want) {
				t.Errorf("%s tau %v: loss %v, gonum simplex %v", pr.name, tau, loss, want)
			}
		}
	}
}

// TestFitTiedRowsExhaustivePairs checks a heavily tied invented problem
// (half the rows are a PV site's nights: driver 0, output 0; outputs
// rounded to whole MW), where the optimum need not be unique, against the
// exhaustive search over pairs. gonum's simplex wrongly reports this
// problem unbounded, so it cannot serve as the reference here.
func TestFitTiedRowsExhaustivePairs(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 13))
	n := 40
	var x, y []float64
	for i := 0; i < n; i++ {
		if i%2 == 0 {
			x, y = append(x, 0), append(y, 0)
			continue
		}
		g := 100 + 800*rng.Float64()
		x, y = append(x, g), append(y, math.Round(g*0.01*(0.7+0.3*rng.Float64())))
	}
	for _, tau := range []float64{0.05, 0.25, 0.5, 0.8, 0.95} {
		_, _, want := bestPair(x, y, tau)
		_, loss, err := Fit(design(x), 2, y, tau)
		if err != nil {
			t.Fatalf("tau %v: %v", tau, err)
		}
		if math.Abs(loss-want) > 1e-9*(1+want) {
			t.Errorf("tau %v: loss %v, exhaustive search %v", tau, loss, want)
		}
	}
}

// TestFitEngelGonumSimplex runs gonum's simplex on the Engel data itself
// (about a second per level, skipped with -short).
func TestFitEngelGonumSimplex(t *testing.T) {
	if testing.Short() {
		t.Skip("-short: gonum's dense simplex takes about a second per level here")
	}
	income, food := engel(t)
	X := design(income)
	for _, tau := range []float64{0.05, 0.95} {
		want := simplexLoss(t, X, 2, food, tau)
		_, loss, err := Fit(X, 2, food, tau)
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(loss-want) > 1e-9*want {
			t.Errorf("tau %v: loss %v, gonum simplex %v", tau, loss, want)
		}
	}
}

// TestFitScaleEquivariance: rescaling a column by c divides its
// coefficient by c; rescaling y by c multiplies beta and the loss by c
// (the equivariance of regression quantiles, Koenker and Bassett 1978;
// recalled from memory, and exact for the linear programme).
func TestFitScaleEquivariance(t *testing.T) {
	income, food := engel(t)
	base, baseLoss, err := Fit(design(income), 2, food, 0.25)
	if err != nil {
		t.Fatal(err)
	}
	scaled := func(v []float64, c float64) []float64 {
		out := make([]float64, len(v))
		for i := range v {
			out[i] = v[i] * c
		}
		return out
	}
	for _, c := range []float64{1000, 0.001} {
		beta, loss, err := Fit(design(scaled(income, c)), 2, food, 0.25)
		if err != nil {
			t.Fatal(err)
		}
		if !near(beta[0], base[0], 1e-9) || !near(beta[1]*c, base[1], 1e-9) || !near(loss, baseLoss, 1e-9) {
			t.Errorf("income x %v: beta %v loss %v, want [%v %v] %v", c, beta, loss, base[0], base[1]/c, baseLoss)
		}
		beta, loss, err = Fit(design(income), 2, scaled(food, c), 0.25)
		if err != nil {
			t.Fatal(err)
		}
		if !near(beta[0], base[0]*c, 1e-9) || !near(beta[1], base[1]*c, 1e-9) || !near(loss, baseLoss*c, 1e-9) {
			t.Errorf("foodexp x %v: beta %v loss %v, want %v x %v", c, beta, loss, base, c)
		}
	}
}

func near(a, b, rel float64) bool { return math.Abs(a-b) <= rel*math.Max(math.Abs(a), math.Abs(b)) }

// TestFitInterpolates: with n = p the fit passes through every point.
func TestFitInterpolates(t *testing.T) {
	beta, loss, err := Fit([]float64{1, 2, 1, 5}, 2, []float64{3, 9}, 0.3)
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(beta[0]-(-1)) > 1e-12 || math.Abs(beta[1]-2) > 1e-12 || loss > 1e-12 {
		t.Errorf("beta %v loss %v, want [-1 2] 0", beta, loss)
	}
}

func TestFitErrors(t *testing.T) {
	nan, inf := math.NaN(), math.Inf(1)
	cases := []struct {
		name string
		X, y []float64
		p    int
		want error
	}{
		{"fewer rows than columns", []float64{1, 2}, []float64{1}, 2, ErrTooFewRows},
		{"NaN in X", []float64{1, nan, 1, 2, 1, 3}, []float64{1, 2, 3}, 2, ErrNonFinite},
		{"Inf in y", []float64{1, 1, 1, 2, 1, 3}, []float64{1, inf, 3}, 2, ErrNonFinite},
		{"zero column", []float64{1, 0, 1, 0, 1, 0}, []float64{1, 2, 3}, 2, ErrRankDeficient},
		{"repeated column", []float64{2, 2, 3, 3, 5, 5}, []float64{1, 2, 3}, 2, ErrRankDeficient},
		{"constant regressor", []float64{1, 7, 1, 7, 1, 7}, []float64{1, 2, 3}, 2, ErrRankDeficient},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, _, err := Fit(c.X, c.p, c.y, 0.5)
			if !errors.Is(err, c.want) {
				t.Errorf("err = %v, want %v", err, c.want)
			}
		})
	}
}

func TestFitPanicsOnMisuse(t *testing.T) {
	cases := []struct {
		name string
		X, y []float64
		p    int
		tau  float64
	}{
		{"p zero", nil, nil, 0, 0.5},
		{"length mismatch", []float64{1, 2, 3}, []float64{1, 2}, 2, 0.5},
		{"tau zero", []float64{1, 1}, []float64{1, 2}, 1, 0},
		{"tau one", []float64{1, 1}, []float64{1, 2}, 1, 1},
		{"tau NaN", []float64{1, 1}, []float64{1, 2}, 1, math.NaN()},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("no panic")
				}
			}()
			Fit(c.X, c.p, c.y, c.tau)
		})
	}
}

// TestFitLargeNOptimal checks a large invented problem for
// optimality without a reference solver: perturbing each coefficient in
// either direction must not lower the loss.
func TestFitLargeNOptimal(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 5))
	n, p := 20000, 4
	X := make([]float64, n*p)
	y := make([]float64, n)
	for i := 0; i < n; i++ {
		X[i*p] = 1
		for j := 1; j < p; j++ {
			X[i*p+j] = rng.Float64() * float64(j) * 100
		}
		y[i] = X[i*p+1]*0.3 - X[i*p+2]*0.1 + rng.NormFloat64()*(1+X[i*p+3]*0.05)
	}
	tau := 0.9
	beta, loss, err := Fit(X, p, y, tau)
	if err != nil {
		t.Fatal(err)
	}
	lossAt := func(b []float64) float64 {
		s := 0.0
		for i := 0; i < n; i++ {
			q := 0.0
			for j := 0; j < p; j++ {
				q += X[i*p+j] * b[j]
			}
			s += score.Pinball(q, y[i], tau)
		}
		return s
	}
	if got := lossAt(beta); !near(got, loss, 1e-12) {
		t.Fatalf("reported loss %v, recomputed %v", loss, got)
	}
	for j := 0; j < p; j++ {
		for _, h := range []float64{-1e-6, 1e-6} {
			b := append([]float64(nil), beta...)
			b[j] += h * math.Max(1, math.Abs(b[j]))
			if l := lossAt(b); l < loss*(1-1e-12) {
				t.Errorf("moving beta[%d] by %g lowers the loss: %v < %v", j, h, l, loss)
			}
		}
	}
}

func BenchmarkFit(b *testing.B) {
	for _, n := range []int{1000, 10000, 100000} {
		rng := rand.New(rand.NewPCG(1, 1))
		p := 5
		X := make([]float64, n*p)
		y := make([]float64, n)
		for i := 0; i < n; i++ {
			X[i*p] = 1
			for j := 1; j < p; j++ {
				X[i*p+j] = rng.NormFloat64()
			}
			y[i] = X[i*p+1] + rng.NormFloat64()
		}
		b.Run("n="+itoa(n)+"/p=5", func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, _, err := Fit(X, p, y, 0.9); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

func itoa(n int) string {
	if n == 0 {
		return "0"
	}
	s := ""
	for ; n > 0; n /= 10 {
		s = string(rune('0'+n%10)) + s
	}
	return s
}
