package wind

import (
	"math"
	"math/rand/v2"
	"testing"
)

// logistic is the known curve the learning tests sample: per-unit power
// 1 / (1 + exp(-(v - 9) / 1.3)), an invented turbine.
func logistic(v float64) float64 { return 1 / (1 + math.Exp(-(v-9)/1.3)) }

// weibull draws a wind speed with shape 2 and scale 8.5 m/s, a typical
// onshore distribution (invented site).
func weibull(rng *rand.Rand) float64 {
	return 8.5 * math.Sqrt(-math.Log(1-rng.Float64()))
}

// train feeds n noisy samples of logistic (Gaussian noise of deviation
// sigma; a share outage of the readings replaced by 0, as when turbines are
// down) to c, and returns the plain mean of the power per bin for
// comparison.
func train(t testing.TB, c *Curve, rng *rand.Rand, n int, sigma, outage float64) (binMean []float64) {
	t.Helper()
	o := c.Options()
	sum := make([]float64, len(c.bins))
	cnt := make([]float64, len(c.bins))
	for range n {
		v := weibull(rng)
		p := logistic(v) + sigma*rng.NormFloat64()
		if rng.Float64() < outage {
			p = 0
		}
		c.Add(v, p)
		if i := int(v / o.BinWidth); v < o.MaxSpeed {
			sum[i] += p
			cnt[i]++
		}
	}
	for i := range sum {
		sum[i] /= cnt[i]
	}
	return sum
}

// checkMonotone fails unless c.Eval is non-decreasing on a fine grid from
// -1 to 40 m/s (rounding allowance 1e-12).
func checkMonotone(t *testing.T, c *Curve) {
	t.Helper()
	prev := math.Inf(-1)
	for v := -1.0; v <= 40; v += 0.01 {
		got := c.Eval(v)
		if math.IsNaN(got) || got < prev-1e-12 {
			t.Fatalf("Eval(%.2f) = %v after %v: not monotone", v, got, prev)
		}
		prev = got
	}
}

// TestCurveLearnsLogistic: from 200000 noisy samples (deviation 0.05) of a
// known logistic curve, the learned curve is within 0.02 of it from 0.5 to
// 20 m/s (where the Weibull draw puts data in every bin) and monotone.
func TestCurveLearnsLogistic(t *testing.T) {
	c := NewCurve(CurveOptions{})
	train(t, c, rand.New(rand.NewPCG(1, 2)), 200000, 0.05, 0)
	worst, at := 0.0, 0.0
	for v := 0.5; v <= 20; v += 0.05 {
		if e := math.Abs(c.Eval(v) - logistic(v)); e > worst {
			worst, at = e, v
		}
	}
	if worst > 0.02 {
		t.Errorf("largest error %.4f at %.2f m/s, want 0.02 or less", worst, at)
	}
	t.Logf("largest error %.4f at %.2f m/s", worst, at)
	checkMonotone(t, c)
}

// TestCurveRobustToOutages: with a tenth of the readings at zero (turbines
// down), the per-bin median stays within 0.03 of the curve, where the plain
// bin mean falls short by about a tenth of the power (checked too, so the
// test shows what the median buys).
func TestCurveRobustToOutages(t *testing.T) {
	c := NewCurve(CurveOptions{})
	mean := train(t, c, rand.New(rand.NewPCG(3, 4)), 200000, 0.05, 0.1)
	worst, worstMean := 0.0, 0.0
	for v := 0.5; v <= 20; v += 0.05 {
		worst = math.Max(worst, math.Abs(c.Eval(v)-logistic(v)))
	}
	for i, m := range mean {
		if v := (float64(i) + 0.5) * 0.5; v >= 0.5 && v <= 20 {
			worstMean = math.Max(worstMean, math.Abs(m-logistic(v)))
		}
	}
	if worst > 0.03 {
		t.Errorf("median curve: largest error %.4f, want 0.03 or less", worst)
	}
	if worstMean < 0.07 {
		t.Errorf("bin mean: largest error %.4f, expected about 0.1: the case does not discriminate", worstMean)
	}
	t.Logf("largest error: median curve %.4f, bin mean %.4f", worst, worstMean)
	checkMonotone(t, c)
}

// TestBinMedian holds one bin's estimator to the median of a skewed
// distribution: 0.5 times an exponential of rate 1 has median 0.5 ln 2 =
// 0.34657 and mean 0.5 [computed by hand].
func TestBinMedian(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	var b bin
	for range 50000 {
		b.add(0.5*rng.ExpFloat64(), 0)
	}
	if want := 0.5 * math.Ln2; math.Abs(b.med-want) > 0.01 {
		t.Errorf("median estimate %.4f, want %.4f within 0.01", b.med, want)
	}
}

// TestBinMemory: with Memory a bin follows a step change of its level; the
// estimate ends within 0.02 of the new level after 5000 samples.
func TestBinMemory(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	var b bin
	for range 5000 {
		b.add(0.8+0.05*rng.NormFloat64(), 500)
	}
	for range 5000 {
		b.add(0.6+0.05*rng.NormFloat64(), 500)
	}
	if math.Abs(b.med-0.6) > 0.02 {
		t.Errorf("median estimate %.4f after the change, want 0.6 within 0.02", b.med)
	}
}

// TestPAVA checks pool-adjacent-violators on cases pooled by hand.
func TestPAVA(t *testing.T) {
	tests := []struct {
		name string
		y, w []float64
		want []float64
	}{
		{"already monotone", []float64{1, 2, 2, 5}, []float64{1, 1, 1, 1}, []float64{1, 2, 2, 5}},
		{"one violation", []float64{1, 3, 2, 4}, []float64{1, 1, 1, 1}, []float64{1, 2.5, 2.5, 4}},
		{"weighted pool", []float64{1, 3, 2}, []float64{1, 1, 3}, []float64{1, 2.25, 2.25}}, // (3 + 6)/4
		{"decreasing, equal weights", []float64{5, 4, 3, 2, 1}, []float64{1, 1, 1, 1, 1}, []float64{3, 3, 3, 3, 3}},
		{"decreasing, weighted", []float64{5, 4, 3, 2, 1}, []float64{1, 2, 3, 4, 5}, []float64{7.0 / 3, 7.0 / 3, 7.0 / 3, 7.0 / 3, 7.0 / 3}}, // 35/15
		{"cascade", []float64{0, 4, 5, 1, 6}, []float64{1, 1, 1, 1, 1}, []float64{0, 10.0 / 3, 10.0 / 3, 10.0 / 3, 6}},
		{"single", []float64{0.7}, []float64{2}, []float64{0.7}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			n := len(tc.y)
			y := append([]float64(nil), tc.y...)
			pava(y, tc.w, make([]float64, n), make([]float64, n), make([]int, n))
			for i := range y {
				if math.Abs(y[i]-tc.want[i]) > 1e-12 {
					t.Fatalf("pava(%v, %v) = %v, want %v", tc.y, tc.w, y, tc.want)
				}
			}
		})
	}
}

// TestCurveFill checks the fit on a hand-built case: identical samples make
// each bin's estimate exact, so the values follow from the documented fill
// rules [computed by hand].
func TestCurveFill(t *testing.T) {
	c := NewCurve(CurveOptions{}) // bins 0.5 m/s wide, MinCount 5
	for range 10 {
		c.Add(4.1, 0.1) // bin [4, 4.5), centre 4.25
		c.Add(8.3, 0.5) // bin [8, 8.5), centre 8.25
	}
	c.Add(6.3, 0.9) // a thin bin (2 samples): left out, interpolated over
	c.Add(6.4, 0.9)
	tests := []struct {
		name  string
		speed float64
		want  float64
	}{
		{"at a fitted bin centre", 4.25, 0.1},
		{"across the thin bin", 6.25, 0.3},
		{"between centres", 5.25, 0.2},
		{"rising from zero", 2.125, 0.05},
		{"first bin's centre", 0.25, 0.1 * 0.25 / 4.25},
		{"zero speed", 0, 0},
		{"negative speed", -3, 0},
		{"flat beyond the last bin", 12, 0.5},
		{"far beyond", math.Inf(1), 0.5},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			checkClose(t, c.Eval(tc.speed), tc.want, 1e-12)
		})
	}
	if got := c.Eval(math.NaN()); !math.IsNaN(got) {
		t.Errorf("Eval(NaN) = %v, want NaN", got)
	}
}

// TestCurveViolationPooled: a dip in the data is pooled away (equal
// weights: (0.6 + 0.4)/2 = 0.5 [computed by hand]).
func TestCurveViolationPooled(t *testing.T) {
	c := NewCurve(CurveOptions{MinCount: 1})
	c.Add(5.1, 0.2)
	c.Add(6.1, 0.6)
	c.Add(7.1, 0.4)
	c.Add(8.1, 0.9)
	for _, tc := range []struct{ speed, want float64 }{{5.25, 0.2}, {6.25, 0.5}, {6.75, 0.5}, {7.25, 0.5}, {8.25, 0.9}} {
		checkClose(t, c.Eval(tc.speed), tc.want, 1e-12)
	}
	checkMonotone(t, c)
}

// TestCurveThinDataFallback: before any bin reaches MinCount, the thin bins
// are used, so one sample defines the curve; before any, Eval is NaN.
func TestCurveThinDataFallback(t *testing.T) {
	var c Curve // the zero value is an empty default curve
	if got := c.Eval(7); !math.IsNaN(got) {
		t.Fatalf("Eval on an empty curve = %v, want NaN", got)
	}
	c.Add(7.1, 0.35)
	checkClose(t, c.Eval(7.25), 0.35, 1e-12)
	checkClose(t, c.Eval(20), 0.35, 1e-12)
	if c.Options().MinCount != 5 || c.Options().BinWidth != 0.5 || c.Options().MaxSpeed != 30 {
		t.Errorf("zero Curve options %+v, want the defaults", c.Options())
	}
}

// TestCurveNegativeValues: small negative readings (auxiliary consumption
// at standstill) pull the anchor at zero speed down, keeping the curve
// monotone.
func TestCurveNegativeValues(t *testing.T) {
	c := NewCurve(CurveOptions{MinCount: 1})
	c.Add(1.1, -0.01)
	c.Add(9.1, 0.7)
	checkClose(t, c.Eval(0), -0.01, 1e-12)
	checkClose(t, c.Eval(1.25), -0.01, 1e-12)
	checkMonotone(t, c)
}

// TestCurveIgnores: samples Add cannot place leave the curve empty.
func TestCurveIgnores(t *testing.T) {
	c := NewCurve(CurveOptions{MaxSpeed: 25})
	nan, inf := math.NaN(), math.Inf(1)
	for _, s := range [][2]float64{{nan, 0.5}, {5, nan}, {-1, 0.2}, {25, 0}, {31, 0}, {inf, 1}, {5, inf}, {5, 11}, {5, -11}} {
		c.Add(s[0], s[1])
	}
	if c.Samples() != 0 || !math.IsNaN(c.Eval(5)) {
		t.Errorf("after bad samples: %d accepted, Eval(5) = %v; want 0 and NaN", c.Samples(), c.Eval(5))
	}
	c.Add(24.99, 1)
	if c.Samples() != 1 {
		t.Errorf("a sample just below MaxSpeed was not accepted")
	}
}

// TestNewCurvePanics: invalid options are programmer errors.
func TestNewCurvePanics(t *testing.T) {
	tests := []struct {
		name string
		o    CurveOptions
	}{
		{"negative bin width", CurveOptions{BinWidth: -0.5}},
		{"NaN bin width", CurveOptions{BinWidth: math.NaN()}},
		{"infinite max speed", CurveOptions{MaxSpeed: math.Inf(1)}},
		{"negative min count", CurveOptions{MinCount: -1}},
		{"negative memory", CurveOptions{Memory: -1}},
		{"too many bins", CurveOptions{BinWidth: 1e-6}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Errorf("NewCurve(%+v) did not panic", tc.o)
				}
			}()
			NewCurve(tc.o)
		})
	}
}

// TestCurveDoesNotAllocate holds Add and Eval, including the lazy refit, to
// zero allocations.
func TestCurveDoesNotAllocate(t *testing.T) {
	c := NewCurve(CurveOptions{})
	train(t, c, rand.New(rand.NewPCG(9, 10)), 5000, 0.05, 0)
	v := 0.0
	n := testing.AllocsPerRun(200, func() {
		v = math.Mod(v+0.37, 25)
		c.Add(v, logistic(v))
		_ = c.Eval(v)
	})
	if n != 0 {
		t.Errorf("Add then Eval allocates %v times", n)
	}
}
