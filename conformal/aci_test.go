package conformal

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// miss and hit are outcomes with err = 1 and err = 0.
var (
	missOutcome = Outcome{Y: 1, Issued: 0, PIT: math.NaN()}
	hitOutcome  = Outcome{Y: 0, Issued: 1, PIT: math.NaN()}
)

// TestACIMethodsCheck is the ACI check of METHODS.md section 4 (Gibbs and
// Candes 2021) [paper; computed]: alpha = 0.1, gamma = 0.05, alpha_1 = 0.1
// and errors 1, 0, 0, 1 give alpha_2..5 = 0.055, 0.060, 0.065, 0.020.
func TestACIMethodsCheck(t *testing.T) {
	a := NewACI(0.9, ACIOptions{Gamma: 0.05})
	if got := a.Alpha(); !near(got, 0.1, 1e-15) {
		t.Fatalf("alpha_1 = %v, want 0.1", got)
	}
	errs := []int{1, 0, 0, 1}
	want := []float64{0.055, 0.060, 0.065, 0.020}
	for i, e := range errs {
		o := hitOutcome
		if e == 1 {
			o = missOutcome
		}
		a.Update(o)
		if got := a.Alpha(); !near(got, want[i], 1e-12) {
			t.Errorf("alpha_%d = %v, want %v", i+2, got, want[i])
		}
		if level, offset := a.Adjust(); !near(level, 1-want[i], 1e-12) || offset != 0 {
			t.Errorf("after err_%d Adjust = (%v, %v), want (%v, 0)", i+1, level, offset, 1-want[i])
		}
	}
}

// TestACIBoundValues holds ACIBound to METHODS.md section 4 [computed]:
// alpha_1 = 0.1, gamma = 0.005 give 0.181 at T = 1000 and 0.0181 at T = 10000.
func TestACIBoundValues(t *testing.T) {
	cases := []struct {
		name string
		t    int
		want float64
	}{
		{"METHODS.md s4 T=1000", 1000, 0.181},
		{"METHODS.md s4 T=10000", 10000, 0.0181},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := ACIBound(0.1, 0.005, c.t); !near(got, c.want, 1e-12) {
				t.Errorf("ACIBound(0.1, 0.005, %d) = %v, want %v", c.t, got, c.want)
			}
		})
	}
}

// normalQuantile is a synthetic forecaster: the N(0, 1) quantile at level l,
// -Inf at or below 0 and +Inf at or above 1.
func normalQuantile(l float64) float64 {
	switch {
	case l <= 0:
		return math.Inf(-1)
	case l >= 1:
		return math.Inf(1)
	}
	return distuv.UnitNormal.Quantile(l)
}

// TestACIBoundAdversarial checks the deterministic bound of Gibbs and Candes
// (2021), METHODS.md section 4 [paper]: |mean(err_1..T) - alpha| <=
// (max(alpha_1, 1 - alpha_1) + gamma) / (gamma T) at every T, on outcome
// sequences that do not follow the forecaster (a fixed N(0, 1) quantile
// function), so each miss depends on the level ACI asks for.
func TestACIBoundAdversarial(t *testing.T) {
	const steps = 10000
	seqs := []struct {
		name string
		y    func(rng *rand.Rand, i int) float64
	}{
		{"alternating +1 and -1", func(_ *rand.Rand, i int) float64 { return float64(1 - 2*(i%2)) }},
		{"far above then far below (all-miss then all-hit)", func(_ *rand.Rand, i int) float64 {
			if i < steps/2 {
				return 3
			}
			return -3
		}},
		{"alternating regimes N(+2,1) and N(-2,1)", func(rng *rand.Rand, i int) float64 {
			return float64(2-4*(i%2)) + rng.NormFloat64()
		}},
		{"seeded uniform on [-4, 4]", func(rng *rand.Rand, _ int) float64 { return -4 + 8*rng.Float64() }},
		{"seeded random walk mean, sd 2", func() func(*rand.Rand, int) float64 {
			mu := 0.0
			return func(rng *rand.Rand, _ int) float64 {
				mu += 0.05 * rng.NormFloat64()
				return mu + 2*rng.NormFloat64()
			}
		}()},
	}
	rawOff := false // some sequence must defeat the uncalibrated forecaster
	for _, s := range seqs {
		for _, gamma := range []float64{0.005, 0.05} {
			for _, level := range []float64{0.1, 0.5, 0.9} {
				t.Run(fmt.Sprintf("%s/gamma=%v/level=%v", s.name, gamma, level), func(t *testing.T) {
					rng := rand.New(rand.NewPCG(7, 11))
					a := NewACI(level, ACIOptions{Gamma: gamma})
					alpha, alpha1 := 1-level, a.Alpha()
					misses, rawMisses := 0, 0
					for i := range steps {
						y := s.y(rng, i)
						l, off := a.Adjust()
						o := Outcome{Y: y, Issued: normalQuantile(l) + off, PIT: math.NaN()}
						if !o.Hit() {
							misses++
						}
						if y > normalQuantile(level) {
							rawMisses++
						}
						a.Update(o)
						T := i + 1
						if dev, bound := math.Abs(float64(misses)/float64(T)-alpha), ACIBound(alpha1, gamma, T); dev > bound+1e-12 {
							t.Fatalf("T = %d: |miss rate - alpha| = %v exceeds the bound %v", T, dev, bound)
						}
					}
					if misses == 0 || misses == steps {
						t.Fatalf("%d misses in %d: the sequence never tests the level", misses, steps)
					}
					if math.Abs(float64(rawMisses)/steps-alpha) > ACIBound(alpha1, gamma, steps) {
						rawOff = true
					}
				})
			}
		}
	}
	if !rawOff {
		t.Error("no sequence put the uncalibrated forecaster outside the bound; the test proves nothing")
	}
}

// TestACIWeightedBound: with weighted steps (Outcome.Weight) the steps
// telescope as in Gibbs and Candes's (2021) proof of the bound, so the
// weighted miss rate sum w (err - alpha) / sum w stays within
// (max(alpha_1, 1 - alpha_1) + gamma max(w)) / (gamma sum w) (our
// derivation from theirs, see ACI.Update), and the identity
// sum w (err - alpha) = (alpha_1 - alpha_{T+1}) / gamma holds to rounding.
// The weights, in [1/2, 2] (wider than the worker's [2/3, 3/2]), are tied to the
// outcome (2 where it lies high, 1/2 where low), so the unweighted miss
// rate is pulled off alpha; a calibrator that ignored them would fail.
func TestACIWeightedBound(t *testing.T) {
	const steps = 20000
	for _, gamma := range []float64{0.005, 0.05} {
		for _, level := range []float64{0.1, 0.5, 0.9} {
			t.Run(fmt.Sprintf("gamma=%v/level=%v", gamma, level), func(t *testing.T) {
				rng := rand.New(rand.NewPCG(3, 5))
				a := NewACI(level, ACIOptions{Gamma: gamma})
				alpha, alpha1 := 1-level, a.Alpha()
				var sw, swErr float64
				misses := 0
				for i := range steps {
					y := 2 * rng.NormFloat64() // wider than the forecaster
					w := 0.5
					if y > 0 {
						w = 2
					}
					l, off := a.Adjust()
					o := Outcome{Y: y, Issued: normalQuantile(l) + off, PIT: math.NaN(), Weight: w}
					err := 0.0
					if !o.Hit() {
						err = 1
						misses++
					}
					a.Update(o)
					sw += w
					swErr += w * (err - alpha)
					bound := (max(alpha1, 1-alpha1) + gamma*2) / (gamma * sw)
					if dev := math.Abs(swErr / sw); dev > bound+1e-12 {
						t.Fatalf("T = %d: weighted |miss rate - alpha| = %v exceeds %v", i+1, dev, bound)
					}
				}
				if got, want := swErr, (alpha1-a.Alpha())/gamma; math.Abs(got-want) > 1e-6*math.Max(1, math.Abs(want)) {
					t.Errorf("sum w (err - alpha) = %v, (alpha_1 - alpha_T+1) / gamma = %v", got, want)
				}
				if dev := math.Abs(float64(misses)/steps - alpha); dev < 0.01 {
					t.Errorf("unweighted miss rate %v within %v of alpha: the weights test nothing", float64(misses)/steps, dev)
				}
			})
		}
	}
}

// TestACIAlphaLeavesUnitInterval shows alpha_t crossing 0 and 1 and the
// level asked for following it: with alpha_t <= 0 the set is everything (a
// hit), with alpha_t >= 1 it is empty (a miss), METHODS.md section 4.
func TestACIAlphaLeavesUnitInterval(t *testing.T) {
	a := NewACI(0.5, ACIOptions{Gamma: 0.5})
	for range 3 {
		a.Update(missOutcome) // alpha += 0.5 (0.5 - 1)
	}
	if l, _ := a.Adjust(); !(l >= 1) || !math.IsInf(normalQuantile(l), 1) {
		t.Errorf("after three misses level %v, want at least 1 (+Inf quantile)", l)
	}
	for range 6 {
		a.Update(hitOutcome) // alpha += 0.5 (0.5 - 0)
	}
	if l, _ := a.Adjust(); !(l <= 0) || !math.IsInf(normalQuantile(l), -1) {
		t.Errorf("after six hits level %v, want at most 0 (-Inf quantile)", l)
	}
}

func TestACIIgnoresUnknownOutcomes(t *testing.T) {
	a := NewACI(0.9, ACIOptions{})
	before := a.Alpha()
	for _, o := range []Outcome{
		{Y: math.NaN(), Issued: 1},
		{Y: 1, Issued: math.NaN()},
	} {
		a.Update(o)
	}
	if a.Alpha() != before {
		t.Errorf("alpha moved from %v to %v on outcomes with NaN", before, a.Alpha())
	}
	a.Update(Outcome{Y: 2, Issued: 1, PIT: math.NaN()}) // an unknown PIT does not matter
	if want := before + DefaultGamma*(0.1-1); !near(a.Alpha(), want, 1e-15) {
		t.Errorf("alpha = %v after a miss, want %v", a.Alpha(), want)
	}
}

func TestNewACIPanicsOnMisuse(t *testing.T) {
	cases := []struct {
		name  string
		level float64
		gamma float64
	}{
		{"level 0", 0, 0},
		{"level 1", 1, 0},
		{"level NaN", math.NaN(), 0},
		{"negative gamma", 0.5, -0.1},
		{"NaN gamma", 0.5, math.NaN()},
		{"infinite gamma", 0.5, math.Inf(1)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("NewACI did not panic")
				}
			}()
			NewACI(c.level, ACIOptions{Gamma: c.gamma})
		})
	}
}

func TestACIDefaults(t *testing.T) {
	a := NewACI(0.95, ACIOptions{})
	if a.Gamma() != 0.003 || a.Level() != 0.95 || a.Name() != "aci" {
		t.Errorf("gamma %v, level %v, name %q; want 0.003, 0.95, aci", a.Gamma(), a.Level(), a.Name())
	}
	if l, off := a.Adjust(); !near(l, 0.95, 1e-15) || off != 0 {
		t.Errorf("fresh Adjust = (%v, %v), want (0.95, 0)", l, off)
	}
}

func TestACIStateRefusesBadData(t *testing.T) {
	good, err := NewACI(0.9, ACIOptions{Gamma: 0.01}).MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	with := func(i int, v float64) []byte {
		b := bytes.Clone(good)
		copy(b[1+8*i:], appendFloat(nil, v))
		return b
	}
	cases := []struct {
		name string
		data []byte
		want string
	}{
		{"empty", nil, "empty"},
		{"unknown version", append([]byte{2}, good[1:]...), "unknown version 2"},
		{"short", good[:10], "10 bytes, want 25"},
		{"long", append(bytes.Clone(good), 0), "26 bytes"},
		{"level outside (0, 1)", with(0, 1.5), "level"},
		{"zero gamma", with(1, 0), "gamma"},
		{"NaN alpha", with(2, math.NaN()), "alpha_t"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			a := NewACI(0.5, ACIOptions{})
			err := a.UnmarshalBinary(c.data)
			if !errors.Is(err, ErrState) {
				t.Fatalf("err = %v, want one wrapping ErrState", err)
			}
			if !strings.Contains(err.Error(), c.want) {
				t.Errorf("err %q does not say %q", err, c.want)
			}
			if a.Level() != 0.5 || a.Alpha() != 0.5 {
				t.Errorf("a failed restore changed the calibrator")
			}
		})
	}
}

func TestACIStateRoundTrip(t *testing.T) {
	a := NewACI(0.8, ACIOptions{Gamma: 0.02})
	for i := range 37 {
		if i%3 == 0 {
			a.Update(missOutcome)
		} else {
			a.Update(hitOutcome)
		}
	}
	b, _ := a.MarshalBinary()
	var r ACI // UnmarshalBinary makes the zero ACI usable
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if r != *a {
		t.Errorf("restored %+v, want %+v", r, *a)
	}
}

// FuzzACIUnmarshal feeds arbitrary bytes to the state decoder: it must never
// panic, and a state it accepts must encode back to the same bytes.
func FuzzACIUnmarshal(f *testing.F) {
	good, _ := NewACI(0.9, ACIOptions{}).MarshalBinary()
	f.Add(good)
	f.Add([]byte{})
	f.Add([]byte{1, 2, 3})
	f.Fuzz(func(t *testing.T, data []byte) {
		var a ACI
		if !roundTrip(t, &a, data) {
			return
		}
	})
}
