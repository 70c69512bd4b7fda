package conformal

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func TestDtACIDefaults(t *testing.T) {
	d := NewDtACI(0.9, DtACIOptions{})
	g, a, w := d.Experts()
	// METHODS.md section 4: step sizes 0.001, 0.002, ..., 0.128; sigma =
	// 1/1000 and eta = 2.72 in the authors' code [paper].
	wantG := []float64{0.001, 0.002, 0.004, 0.008, 0.016, 0.032, 0.064, 0.128}
	if !slices.Equal(g, wantG) {
		t.Errorf("step sizes %v, want %v", g, wantG)
	}
	for k := range a {
		if !near(a[k], 0.1, 1e-15) || w[k] != 0.125 {
			t.Errorf("expert %d starts at alpha %v weight %v, want 0.1, 1/8", k, a[k], w[k])
		}
	}
	if d.sigma != 0.001 || d.eta != 2.72 || d.Name() != "dtaci" || d.Level() != 0.9 {
		t.Errorf("sigma %v, eta %v, name %q, level %v", d.sigma, d.eta, d.Name(), d.Level())
	}
	if l, off := d.Adjust(); !near(l, 0.9, 1e-15) || off != 0 {
		t.Errorf("fresh Adjust = (%v, %v), want (0.9, 0)", l, off)
	}
}

// TestDtACITwoSteps follows the update of DtACI (Gibbs and Candes 2024, as
// in the authors' code) by hand [computed]: two experts with step sizes
// 0.01 and 0.1, sigma = 0.1, eta = 10, level 0.9 (alpha = 0.1).
//
//	step 1, PIT 0.95, beta = 0.05: equal losses, weights stay 1/2; both
//	  alphas exceed beta (a miss): alpha^1 = 0.1 - 0.01*0.9 = 0.091,
//	  alpha^2 = 0.1 - 0.1*0.9 = 0.01; alpha_t = 0.0505.
//	step 2, PIT 0.92, beta = 0.08: u = beta - alpha^k = -0.011 and 0.07,
//	  losses 0.1 u - min(0, u) = 0.0099 and 0.007; p^1 = 1 / (1 +
//	  exp(10 (0.0099 - 0.007))) = 0.492750, w^1 = 0.9 p^1 + 0.05 = 0.493475,
//	  w^2 = 0.506525; alpha^1 = 0.091 - 0.009 = 0.082 (miss), alpha^2 =
//	  0.01 + 0.01 = 0.02 (hit); alpha_t = 0.050596.
func TestDtACITwoSteps(t *testing.T) {
	// Two experts 0.01 and 0.1 are not a doubling grid: set them as a
	// restored state would.
	d := newDtACI(0.9, 0.1, 10, []float64{0.01, 0.1}, 4)
	d.alphas[0], d.alphas[1], d.w[0], d.w[1] = 0.1, 0.1, 0.5, 0.5
	d.mix()

	d.Update(Outcome{Y: 2, Issued: 1, PIT: 0.95})
	_, a, w := d.Experts()
	if !near(a[0], 0.091, 1e-15) || !near(a[1], 0.01, 1e-15) || !near(w[0], 0.5, 1e-15) || !near(d.Alpha(), 0.0505, 1e-15) {
		t.Fatalf("after step 1 alphas %v weights %v alpha_t %v", a, w, d.Alpha())
	}
	d.Update(Outcome{Y: 2, Issued: 1, PIT: 0.92})
	p1 := 1 / (1 + math.Exp(10*(0.0099-0.007)))
	w1 := 0.9*p1 + 0.05
	_, a, w = d.Experts()
	cases := []struct {
		name      string
		got, want float64
		hand      float64
	}{
		{"w^1", w[0], w1, 0.493475},
		{"w^2", w[1], 1 - w1, 0.506525},
		{"alpha^1", a[0], 0.082, 0.082},
		{"alpha^2", a[1], 0.02, 0.02},
		{"alpha_t", d.Alpha(), w1*0.082 + (1-w1)*0.02, 0.050596},
	}
	for _, c := range cases {
		if !near(c.want, c.hand, 1e-6) {
			t.Fatalf("%s: hand value %v, formula %v", c.name, c.hand, c.want)
		}
		if !near(c.got, c.want, 1e-12) {
			t.Errorf("%s = %v, want %v", c.name, c.got, c.want)
		}
	}
}

// TestDtACIUnknownPIT: without a PIT every expert takes the ACI step on the
// issued set's hit or miss and the weights stay.
func TestDtACIUnknownPIT(t *testing.T) {
	d := NewDtACI(0.8, DtACIOptions{})
	d.Update(Outcome{Y: 1, Issued: 0.5, PIT: 0.99}) // move the weights off uniform
	g, a0, w0 := d.Experts()
	d.Update(Outcome{Y: 1, Issued: 0.5, PIT: math.NaN()}) // a miss
	_, a1, w1 := d.Experts()
	if !slices.Equal(w0, w1) {
		t.Errorf("weights moved from %v to %v", w0, w1)
	}
	mean := 0.0
	for k := range g {
		if want := a0[k] + g[k]*(0.2-1); !near(a1[k], want, 1e-15) {
			t.Errorf("expert %d alpha %v, want %v", k, a1[k], want)
		}
		mean += w1[k] * a1[k]
	}
	if !near(d.Alpha(), mean, 1e-15) {
		t.Errorf("alpha_t %v, want the weighted mean %v", d.Alpha(), mean)
	}
	before, _ := d.MarshalBinary()
	for _, o := range []Outcome{{Y: math.NaN(), Issued: 1, PIT: 0.5}, {Y: 1, Issued: math.NaN(), PIT: 0.5}} {
		d.Update(o)
	}
	if after, _ := d.MarshalBinary(); !bytes.Equal(before, after) {
		t.Error("an outcome with NaN changed the state")
	}
}

// TestDtACIAdaptsToShift is the claim of Gibbs and Candes (JMLR 2024) that
// DtACI tunes its step size to the shifts it meets: on a seeded sequence
// whose outcomes shift abruptly at step 5000 (of 10000), its long-run
// coverage is within 1 point of the level, and its coverage over the 500
// steps after the shift is closer to the level than that of ACI with the
// smallest step size of its grid (0.001) and than the worst of the fixed
// step sizes of its grid run alone.
func TestDtACIAdaptsToShift(t *testing.T) {
	cases := []struct {
		name           string
		level          float64
		mean, variance float64 // of the outcomes after the shift
	}{
		{"level 0.9, mean +1 sd", 0.9, 1, 1},
		{"level 0.5, mean +1 sd", 0.5, 1, 1},
		{"level 0.8, sd doubled", 0.8, 0, 4},
		{"level 0.9, sd halved", 0.9, 0, 0.25},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			rng := rand.New(rand.NewPCG(21, 22))
			ys := make([]float64, 10000)
			for i := range ys {
				ys[i] = rng.NormFloat64()
				if i >= 5000 {
					ys[i] = c.mean + math.Sqrt(c.variance)*ys[i]
				}
			}
			rn := normalRun(len(ys), 0, func(i int) float64 { return ys[i] })
			dt := rn.play(NewDtACI(c.level, DtACIOptions{}))
			longRun, after := dt.coverage(0, 10000), dt.coverage(5000, 5500)
			if math.Abs(longRun-c.level) > 0.01 {
				t.Errorf("long-run coverage %.4f, want within 0.01 of %v", longRun, c.level)
			}
			worst, worstGamma := -1.0, 0.0
			for _, g := range NewDtACI(0.5, DtACIOptions{}).gammas {
				aci := rn.play(NewACI(c.level, ACIOptions{Gamma: g})).coverage(5000, 5500)
				if dev := math.Abs(aci - c.level); dev > worst {
					worst, worstGamma = dev, g
				}
				if g == 0.001 && !(math.Abs(after-c.level) < math.Abs(aci-c.level)) {
					t.Errorf("coverage over the 500 steps after the shift %.4f, ACI with gamma 0.001 %.4f: want DtACI closer to %v", after, aci, c.level)
				}
			}
			if !(math.Abs(after-c.level) < worst) {
				t.Errorf("coverage after the shift %.4f is %.4f off, the worst fixed step (%v) %.4f off", after, math.Abs(after-c.level), worstGamma, worst)
			}
			t.Logf("long-run %.4f; steps 5000-5499: DtACI %.4f, worst fixed step %v off by %.4f", longRun, after, worstGamma, worst)
		})
	}
}

// TestDtACINearTheBound records a limit of the weighted mean of the experts
// (our run, not a published value): when the shift asks for a level close to
// 1, experts with large steps cross alpha = 0, where the forecaster's
// quantile is +Inf, and the mean over-covers. Outcomes N(0, 1) then N(2, 1)
// at level 0.9 need the forecaster's 0.9995 quantile; DtACI covers about
// 0.94 after the shift, each expert alone 0.90 within 1.5 points (ACI's
// long-run guarantee).
func TestDtACINearTheBound(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	ys := make([]float64, 10000)
	for i := range ys {
		ys[i] = rng.NormFloat64()
		if i >= 5000 {
			ys[i] += 2
		}
	}
	rn := normalRun(len(ys), 0, func(i int) float64 { return ys[i] })
	after := rn.play(NewDtACI(0.9, DtACIOptions{})).coverage(6000, 10000)
	if after < 0.92 || after > 0.96 {
		t.Errorf("coverage over steps 6000-9999 %.4f; the limit documented here is about 0.94", after)
	}
	for _, g := range NewDtACI(0.9, DtACIOptions{}).gammas {
		if c := rn.play(NewACI(0.9, ACIOptions{Gamma: g})).coverage(6000, 10000); math.Abs(c-0.9) > 0.015 {
			t.Errorf("ACI with gamma %v alone covers %.4f, want within 0.015 of 0.9", g, c)
		}
	}
	t.Logf("DtACI covers %.4f over steps 6000-9999", after)
}

func TestDtACIOptionsErrors(t *testing.T) {
	cases := []struct {
		name string
		o    DtACIOptions
		want string
	}{
		{"negative MinGamma", DtACIOptions{MinGamma: -0.1}, "dtaci step sizes -0.1"},
		{"NaN MinGamma", DtACIOptions{MinGamma: math.NaN()}, "dtaci step sizes NaN"},
		{"step sizes overflow", DtACIOptions{MinGamma: 1e300, Experts: 64}, "+Inf"},
		{"negative Experts", DtACIOptions{Experts: -1}, "dtaci experts -1"},
		{"too many Experts", DtACIOptions{Experts: 65}, "dtaci experts 65"},
		{"Sigma 1", DtACIOptions{Sigma: 1}, "dtaci sigma 1"},
		{"negative Sigma", DtACIOptions{Sigma: -0.5}, "dtaci sigma -0.5"},
		{"negative Eta", DtACIOptions{Eta: -1}, "dtaci eta -1"},
		{"infinite Eta", DtACIOptions{Eta: math.Inf(1)}, "dtaci eta +Inf"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := New(0.5, Options{Method: "dtaci", DtACI: c.o})
			if err == nil || !strings.Contains(err.Error(), c.want) || !strings.HasPrefix(err.Error(), "conformal: ") {
				t.Fatalf("New: %v, want an error with %q", err, c.want)
			}
			defer func() {
				if recover() == nil {
					t.Error("NewDtACI did not panic")
				}
			}()
			NewDtACI(0.5, c.o)
		})
	}
}

func TestDtACIStateRoundTrip(t *testing.T) {
	d := NewDtACI(0.7, DtACIOptions{Experts: 5, Eta: 5})
	rng := rand.New(rand.NewPCG(8, 9))
	for range 300 {
		y := rng.NormFloat64()
		d.Update(Outcome{Y: y, Issued: 0.5, PIT: rng.Float64()})
	}
	b, _ := d.MarshalBinary()
	var r DtACI // UnmarshalBinary makes the zero DtACI usable
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if again, _ := r.MarshalBinary(); !bytes.Equal(again, b) || r.Alpha() != d.Alpha() {
		t.Fatal("restored state differs")
	}
}

func TestDtACIStateRefusesBadData(t *testing.T) {
	good, _ := NewDtACI(0.9, DtACIOptions{Experts: 2}).MarshalBinary()
	with := func(at int, v []byte) []byte {
		b := bytes.Clone(good)
		copy(b[at:], v)
		return b
	}
	f := func(at int, v float64) []byte { return with(at, appendFloat(nil, v)) }
	const experts = 1 + 3*8 + 4 // where the first expert starts
	cases := []struct {
		name string
		data []byte
		want string
	}{
		{"empty", nil, "empty"},
		{"unknown version", with(0, []byte{3}), "unknown version 3"},
		{"short header", good[:12], "want at least"},
		{"missing expert", good[:len(good)-24], "want"},
		{"level", f(1, 0), "level"},
		{"sigma 0", f(9, 0), "must not be zero"},
		{"sigma 1", f(9, 1), "sigma 1"},
		{"no experts", with(25, appendUint32(nil, 0)), "0 experts"},
		{"step size 0", f(experts, 0), "step size 0"},
		{"alpha Inf", f(experts+8, math.Inf(1)), "alpha +Inf"},
		{"weight above 1", f(experts+16, 1.5), "weight 1.5"},
		{"weights not summing to 1", f(experts+16, 0.1), "sum to"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := NewDtACI(0.5, DtACIOptions{})
			err := r.UnmarshalBinary(c.data)
			if !errors.Is(err, ErrState) || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v, want one wrapping ErrState that says %q", err, c.want)
			}
			if r.Level() != 0.5 || len(r.gammas) != 8 {
				t.Error("a failed restore changed the calibrator")
			}
		})
	}
}

// FuzzDtACIUnmarshal: the decoder never panics, and a state it accepts
// encodes back to the same bytes.
func FuzzDtACIUnmarshal(f *testing.F) {
	good, _ := NewDtACI(0.9, DtACIOptions{Experts: 3}).MarshalBinary()
	f.Add(good)
	f.Add([]byte{1})
	f.Fuzz(func(t *testing.T, data []byte) {
		var d DtACI
		if !roundTrip(t, &d, data) {
			return
		}
	})
}

func BenchmarkDtACIUpdateAdjust(b *testing.B) {
	for _, k := range []int{4, 8, 16} {
		// lag 144: an outcome 36 h after its issue, 15-minute intervals.
		for _, lag := range []int{0, 144} {
			b.Run(fmt.Sprintf("experts=%d/lag=%d", k, lag), func(b *testing.B) {
				d := NewDtACI(0.9, DtACIOptions{Experts: k, MinGamma: 1e-4})
				for i := range 256 {
					d.Update(Outcome{Y: float64(i%10) / 10, Issued: 0.5, PIT: float64(i%10) / 10})
				}
				b.ReportAllocs()
				i := 0
				for b.Loop() {
					l, off := d.Adjust()
					d.Update(Outcome{Y: float64(i%10) / 10, Issued: l + off, PIT: float64(i%10) / 10, Lag: lag})
					i++
				}
			})
		}
	}
}

// delayedCoverage runs a DtACI at level against an AR(1) outcome (phi
// 0.9, marginal sd 1.5) and an N(0, 1) forecaster, each outcome settling
// delay updates after its forecast was issued (lag: the Lag the outcomes
// carry, or -1 for unknown), and returns the share of outcomes at or below
// the issued quantile.
func delayedCoverage(level float64, delay, lag, steps int) float64 {
	d := NewDtACI(level, DtACIOptions{})
	rng := rand.New(rand.NewPCG(21, uint64(delay)))
	y := 0.0
	type issued struct{ y, q float64 }
	queue := make([]issued, 0, delay+1)
	hits, n := 0, 0
	for t := range steps {
		y = 0.9*y + math.Sqrt(1-0.81)*1.5*rng.NormFloat64()
		l, _ := d.Adjust()
		q := normalQuantile(l)
		queue = append(queue, issued{y, q})
		if len(queue) > delay {
			o := queue[0]
			queue = queue[1:]
			d.Update(Outcome{Y: o.y, Issued: o.q, PIT: distuv.UnitNormal.CDF(o.y), Lag: lag})
		}
		if t >= steps/10 { // after a burn-in
			n++
			if y <= q {
				hits++
			}
		}
	}
	return float64(hits) / float64(n)
}

// TestDtACIDelayedFeedback holds DtACI under delayed feedback, when each
// outcome tells its Lag, to what it does with none (the published setting,
// each outcome before the next forecast): on an AR(1) outcome 1.5 times
// wider than the forecaster (a check of our own), the 0.05 and 0.95 levels
// are covered within a point of the no-delay coverage at delays of 1, 12
// and 144 updates, and within 1.5 points of the level. (With no delay it
// covers 0.038 and 0.963: the forecaster needs its 0.993 quantile, close
// to the bound where the mean of the experts over-covers, see DtACI.)
// Judged at the experts' current miss rates (Lag unknown), as before the
// experts' misses were kept, the coverage was 6 to 8 points off at delays
// of 12 and 144 updates: held here at more than 2, so that the comparison
// keeps showing what the Lag buys.
func TestDtACIDelayedFeedback(t *testing.T) {
	const steps = 200_000
	for _, level := range []float64{0.05, 0.95} {
		ref := delayedCoverage(level, 0, 0, steps)
		t.Logf("level %.2f, no delay: coverage %.4f", level, ref)
		for _, delay := range []int{1, 12, 144} {
			at := delayedCoverage(level, delay, delay, steps)
			now := delayedCoverage(level, delay, -1, steps)
			t.Logf("level %.2f, delay %3d: coverage %.4f judged at issue, %.4f judged now", level, delay, at, now)
			if math.Abs(at-ref) > 0.01 || math.Abs(at-level) > 0.015 {
				t.Errorf("level %v, delay %d: coverage %.4f with the lag known, more than a point from %.4f with no delay or 1.5 from the level", level, delay, at, ref)
			}
			if delay >= 12 && math.Abs(now-level) < 0.02 {
				t.Errorf("level %v, delay %d: coverage %.4f judged now: the comparison no longer shows the flaw", level, delay, now)
			}
		}
	}
}

// TestDtACIMissRatesAtIssue checks the experts' miss rates at issue, as
// rebuilt from the misses kept (alpha_t^k less gamma_k (alpha L - S_k)),
// against a record of them taken update by update, at every lag up to
// MaxLag and across the wrap of the ring.
func TestDtACIMissRatesAtIssue(t *testing.T) {
	d := NewDtACI(0.8, DtACIOptions{Experts: 4, MaxLag: 100}) // rounded up to 128
	if d.words != 2 {
		t.Fatalf("%d words of misses, want 2", d.words)
	}
	rng := rand.New(rand.NewPCG(3, 4))
	var history [][]float64 // the experts' miss rates before update t
	for t0 := range 1000 {
		history = append(history, slices.Clone(d.alphas))
		lag := rng.IntN(min(t0, 128) + 1)
		d.Update(Outcome{Y: rng.NormFloat64(), Issued: 0, PIT: rng.Float64(), Lag: lag})
		// d.at holds the rates Update judged the outcome at.
		for k := range d.at {
			if want := history[t0-lag][k]; math.Abs(d.at[k]-want) > 1e-12 {
				t.Fatalf("update %d, lag %d, expert %d: judged at %v, the rate at issue was %v", t0, lag, k, d.at[k], want)
			}
		}
	}
	// A lag beyond what is held is judged at the rates now.
	before := slices.Clone(d.alphas)
	d.Update(Outcome{Y: 0, Issued: 0, PIT: 0.5, Lag: 129})
	if !slices.Equal(d.at, before) {
		t.Errorf("lag 129 beyond the 128 held: judged at %v, want the rates now %v", d.at, before)
	}
}

// TestDtACIStateVersion1 restores a state written before the experts'
// misses were kept: the experts and weights as saved, no misses held, so
// a lagged outcome is judged at the rates now until misses accrue.
func TestDtACIStateVersion1(t *testing.T) {
	d := NewDtACI(0.9, DtACIOptions{Experts: 3})
	rng := rand.New(rand.NewPCG(5, 6))
	for range 50 {
		d.Update(Outcome{Y: rng.NormFloat64(), Issued: 1, PIT: rng.Float64()})
	}
	v2, _ := d.MarshalBinary()
	if v2[0] != 2 {
		t.Fatalf("state version %d, want 2", v2[0])
	}
	v1 := append([]byte{1}, v2[1:dtaciHeaderLen+24*3]...)
	var r DtACI
	if err := r.UnmarshalBinary(v1); err != nil {
		t.Fatal(err)
	}
	if r.Alpha() != d.Alpha() || r.held != 0 || r.words != DefaultDtACIMaxLag/64 {
		t.Fatalf("version 1 restored as alpha %v (want %v), %d held, %d words", r.Alpha(), d.Alpha(), r.held, r.words)
	}
	now := slices.Clone(r.alphas)
	r.Update(Outcome{Y: 0, Issued: 1, PIT: 0.5, Lag: 10})
	if !slices.Equal(r.at, now) {
		t.Errorf("lagged outcome after a version 1 restore judged at %v, want the rates now %v", r.at, now)
	}
	if r.held != 1 {
		t.Errorf("%d updates held after one, want 1", r.held)
	}
}
