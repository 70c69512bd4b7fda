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

// run is one simulated sequence: outcome i is y(i), the forecaster's
// quantile at level l is quant(l) and its CDF at y is cdf(y); each forecast
// settles delay updates after it was issued (0: before the next one).
type run struct {
	steps int
	delay int
	y     func(i int) float64
	quant func(l float64) float64
	cdf   func(y float64) float64
}

// normalRun is a run whose forecaster is N(0, 1).
func normalRun(steps, delay int, y func(i int) float64) run {
	return run{steps: steps, delay: delay, y: y, quant: normalQuantile, cdf: distuv.UnitNormal.CDF}
}

// result is what a run records per step.
type result struct {
	hit    []bool
	issued []float64
	y      []float64
}

// coverage returns the share of hits over steps [from, to).
func (r result) coverage(from, to int) float64 {
	n := 0
	for _, h := range r.hit[from:to] {
		if h {
			n++
		}
	}
	return float64(n) / float64(to-from)
}

// pinball returns the mean pinball loss at level tau over steps [from, to).
func (r result) pinball(tau float64, from, to int) float64 {
	s := 0.0
	for i := from; i < to; i++ {
		s += pinballLoss(r.y[i], r.issued[i], tau)
	}
	return s / float64(to-from)
}

func pinballLoss(y, q, tau float64) float64 {
	if y <= q {
		return (1 - tau) * (q - y)
	}
	return tau * (y - q)
}

// play drives cal through the run.
func (rn run) play(cal Calibrator) result {
	res := result{hit: make([]bool, rn.steps), issued: make([]float64, rn.steps), y: make([]float64, rn.steps)}
	settle := func(i int) {
		cal.Update(Outcome{Y: res.y[i], Issued: res.issued[i], PIT: rn.cdf(res.y[i])})
	}
	for i := range rn.steps {
		l, off := cal.Adjust()
		res.issued[i] = rn.quant(l) + off
		res.y[i] = rn.y(i)
		res.hit[i] = res.y[i] <= res.issued[i]
		if j := i - rn.delay; j >= 0 {
			settle(j)
		}
	}
	return res
}

// TestTrackerMethodsCheck is the quantile-tracking check of METHODS.md
// section 4 (Angelopoulos, Candes and Tibshirani 2023) [paper; computed]:
// eta = 0.5, q_1 = 0, alpha = 0.1 on scores 1, 0.2, 3 with
// q_{t+1} = q_t + eta (err_t - alpha) gives 0.45, 0.40, 0.85. The raw
// quantile is 0, so the issued value is the offset and Y is the score.
func TestTrackerMethodsCheck(t *testing.T) {
	tr := NewTracker(0.9, TrackerOptions{Eta: 0.5, KI: -1})
	if _, off := tr.Adjust(); off != 0 {
		t.Fatalf("q_1 = %v, want 0", off)
	}
	scores := []float64{1, 0.2, 3}
	want := []float64{0.45, 0.40, 0.85}
	for i, s := range scores {
		l, off := tr.Adjust()
		if l != 0.9 {
			t.Fatalf("level %v, want 0.9", l)
		}
		tr.Update(Outcome{Y: s, Issued: off, PIT: math.NaN()})
		if _, got := tr.Adjust(); !near(got, want[i], 1e-12) {
			t.Errorf("q_%d = %v, want %v", i+2, got, want[i])
		}
	}
}

// TestTrackerIntegrator checks the integrator term as documented on Tracker
// [computed by hand]: level 0.9, Eta 0.5, KI 2, Csat 5.
//
//	outcome 1: Y = 1, Issued = 0, a miss: d = 1, B = MinScale = 0.001 (one
//	  error, no spread), p = 0.45, S = 0.9, t = 1:
//	  r = 2 * 0.001 * tanh(0.9 ln 2 / 10) = 1.24605e-4
//	outcome 2: Y = 0, Issued = 3, a hit: d = -3; errors {-3, 1}, type-7
//	  quantiles 0.8 and -2.8, B = 3.6; p = 0.40, S = 0.8, t = 2:
//	  r = 2 * 3.6 * tanh(0.8 ln 3 / 15) = 0.421385
func TestTrackerIntegrator(t *testing.T) {
	tr := NewTracker(0.9, TrackerOptions{Eta: 0.5, KI: 2, Csat: 5})
	steps := []struct {
		o       Outcome
		p, b, r float64
		rApprox float64
	}{
		{Outcome{Y: 1, Issued: 0, PIT: math.NaN()}, 0.45, 0.001, 2 * 0.001 * math.Tanh(0.9*math.Ln2/10), 1.24605e-4},
		{Outcome{Y: 0, Issued: 3, PIT: math.NaN()}, 0.40, 3.6, 2 * 3.6 * math.Tanh(0.8*math.Log(3)/15), 0.421385},
	}
	for i, s := range steps {
		tr.Update(s.o)
		if !near(s.r, s.rApprox, 1e-6) {
			t.Fatalf("step %d: the hand value %v and the formula %v disagree", i+1, s.rApprox, s.r)
		}
		if got := tr.Scale(); !near(got, s.b, 1e-12) {
			t.Errorf("step %d: B = %v, want %v", i+1, got, s.b)
		}
		if got := tr.Integrator(); !near(got, s.r, 1e-12) {
			t.Errorf("step %d: r = %v, want %v", i+1, got, s.r)
		}
		if _, got := tr.Adjust(); !near(got, s.p+s.r, 1e-12) {
			t.Errorf("step %d: offset = %v, want p + r = %v", i+1, got, s.p+s.r)
		}
	}
}

// TestTrackerIntegratorIsBounded drives the accumulated error far from zero
// (every outcome a miss) and checks |r| <= KI B, the bound of our saturating
// function.
func TestTrackerIntegratorIsBounded(t *testing.T) {
	tr := NewTracker(0.5, TrackerOptions{Eta: 1e-9, KI: 3, Csat: 0.01})
	for i := range 2000 {
		tr.Update(Outcome{Y: float64(i % 7), Issued: -1, PIT: math.NaN()})
		if r, b := tr.Integrator(), tr.Scale(); !(r > 0) || r > 3*b*(1+1e-12) {
			t.Fatalf("outcome %d: r = %v, want in (0, KI B = %v]", i+1, r, 3*b)
		}
	}
	if r, b := tr.Integrator(), tr.Scale(); r < 0.99*3*b {
		t.Errorf("after 2000 misses r = %v, want near its bound %v", r, 3*b)
	}
}

// TestTrackerScaleFree: the step follows the spread of the errors, so
// outcomes and forecasts in kW instead of MW give offsets 1000 times as
// large (METHODS.md section 4: the step proportional to the score range, as
// in the conformal PID authors' code).
func TestTrackerScaleFree(t *testing.T) {
	o := TrackerOptions{MinScale: 1e-300}
	mw, kw := NewTracker(0.8, o), NewTracker(0.8, o)
	rng := rand.New(rand.NewPCG(3, 4))
	for i := range 3000 {
		y := 0.7 + rng.NormFloat64()
		_, offMW := mw.Adjust()
		_, offKW := kw.Adjust()
		if i > 10 && math.Abs(offKW/1000-offMW) > 1e-9*math.Abs(offMW) {
			t.Fatalf("step %d: offset %v MW but %v kW", i, offMW, offKW)
		}
		q := normalQuantile(0.8)
		mw.Update(Outcome{Y: y, Issued: q + offMW, PIT: math.NaN()})
		kw.Update(Outcome{Y: 1000 * y, Issued: 1000*q + offKW, PIT: math.NaN()})
	}
	if _, off := mw.Adjust(); !(off > 0.3) {
		t.Errorf("offset %v after outcomes shifted by +0.7: the tracker did not move", off)
	}
}

// TestTrackerRestoresCoverageAfterJump: outcomes N(0, 1) against an N(0, 1)
// forecaster jump by 2 sd at step 5000; the tracker must bring coverage over
// steps 6000-10000 back within 2 percentage points of the level, where the
// raw forecaster covers Phi(Phi^-1(tau) - jump) [computed], far off. The
// jump is +2 sd for the upper levels and -2 sd, the mirror image, for the
// lower one: a jump against a tail level tau is corrected at a pace of only
// tau eta per miss (at tau = 0.1 with a +2 sd jump the coverage over steps
// 6000-10000 is 0.079 with the default step, in our run).
func TestTrackerRestoresCoverageAfterJump(t *testing.T) {
	cases := []struct {
		level, jump float64
	}{
		{0.5, 2}, {0.9, 2}, {0.95, 2}, {0.1, -2},
	}
	for _, c := range cases {
		for _, delay := range []int{0, 96} {
			t.Run(fmt.Sprintf("level=%v/jump=%v/delay=%d", c.level, c.jump, delay), func(t *testing.T) {
				rng := rand.New(rand.NewPCG(11, math.Float64bits(c.level)))
				rn := normalRun(10000, delay, func(i int) float64 {
					if i >= 5000 {
						return c.jump + rng.NormFloat64()
					}
					return rng.NormFloat64()
				})
				res := rn.play(NewTracker(c.level, TrackerOptions{}))
				raw := distuv.UnitNormal.CDF(normalQuantile(c.level) - c.jump)
				if math.Abs(raw-c.level) < 0.05 {
					t.Fatalf("raw coverage %v: the jump does not test the tracker", raw)
				}
				if cov := res.coverage(6000, 10000); math.Abs(cov-c.level) > 0.02 {
					t.Errorf("coverage over steps 6000-10000 %.4f, want within 0.02 of %v (raw forecaster %.4f)", cov, c.level, raw)
				} else {
					t.Logf("coverage over steps 6000-10000 %.4f (raw forecaster %.4f)", cov, raw)
				}
			})
		}
	}
}

// TestTrackerDelayedFeedbackStability holds the default step to the
// stability claim on Tracker: with N(0, 1) outcomes settling 144 updates
// late the default LR keeps coverage within 1 point and the pinball loss
// within 2% of the true quantile's, while LR = 0.01 oscillates (a loss more
// than twice as large), which shows what the delay costs a large step.
func TestTrackerDelayedFeedbackStability(t *testing.T) {
	cases := []struct {
		name   string
		lr     float64
		stable bool
	}{
		{"default LR", 0, true},
		{"LR 0.01", 0.01, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			rng := rand.New(rand.NewPCG(5, 6))
			rn := normalRun(20000, 144, func(int) float64 { return rng.NormFloat64() })
			res := rn.play(NewTracker(0.5, TrackerOptions{LR: c.lr}))
			oracle := result{y: res.y, issued: make([]float64, len(res.y))} // the true median, 0
			ratio := res.pinball(0.5, 0, 20000) / oracle.pinball(0.5, 0, 20000)
			cov := res.coverage(0, 20000)
			t.Logf("coverage %.4f, pinball loss %.4f times the true median's", cov, ratio)
			if c.stable && (math.Abs(cov-0.5) > 0.01 || ratio > 1.02) {
				t.Errorf("coverage %.4f and loss ratio %.4f, want within 0.01 of 0.5 and below 1.02", cov, ratio)
			}
			if !c.stable && ratio < 2 {
				t.Errorf("loss ratio %.4f, want above 2 (the documented instability)", ratio)
			}
		})
	}
}

func TestTrackerIgnoresUnknownOutcomes(t *testing.T) {
	tr := NewTracker(0.9, TrackerOptions{})
	tr.Update(Outcome{Y: 1, Issued: 0.5, PIT: math.NaN()})
	before, _ := tr.MarshalBinary()
	for _, o := range []Outcome{{Y: math.NaN(), Issued: 1}, {Y: 1, Issued: math.NaN()}} {
		tr.Update(o)
	}
	if after, _ := tr.MarshalBinary(); !bytes.Equal(before, after) {
		t.Error("an outcome with NaN changed the state")
	}
	// An infinite issued value is a hit that stays out of the scale.
	b := tr.Scale()
	_, off := tr.Adjust()
	tr.Update(Outcome{Y: 3, Issued: math.Inf(1), PIT: math.NaN()})
	if tr.Scale() != b {
		t.Errorf("scale moved from %v to %v on an infinite error", b, tr.Scale())
	}
	if _, got := tr.Adjust(); !(got < off) {
		t.Errorf("offset %v after a hit, want below %v", got, off)
	}
}

func TestTrackerDefaults(t *testing.T) {
	tr := NewTracker(0.95, TrackerOptions{})
	want := TrackerOptions{LR: 0.003, KI: 1, Csat: 5, Window: 500, MinScale: 0.001}
	if tr.Options() != want || tr.Name() != "pid" || tr.Level() != 0.95 {
		t.Errorf("options %+v, name %q, level %v; want %+v, pid, 0.95", tr.Options(), tr.Name(), tr.Level(), want)
	}
	if l, off := tr.Adjust(); l != 0.95 || off != 0 {
		t.Errorf("fresh Adjust = (%v, %v), want (0.95, 0)", l, off)
	}
	if ki := NewTracker(0.5, TrackerOptions{KI: -1}).Options().KI; ki != 0 {
		t.Errorf("KI -1 resolved to %v, want 0 (off)", ki)
	}
}

func TestTrackerOptionsErrors(t *testing.T) {
	cases := []struct {
		name string
		o    TrackerOptions
		want string
	}{
		{"negative LR", TrackerOptions{LR: -1}, "pid lr -1"},
		{"infinite LR", TrackerOptions{LR: math.Inf(1)}, "pid lr +Inf"},
		{"negative Eta", TrackerOptions{Eta: -0.1}, "pid eta -0.1"},
		{"NaN Eta", TrackerOptions{Eta: math.NaN()}, "pid eta NaN"},
		{"NaN KI", TrackerOptions{KI: math.NaN()}, "pid ki NaN"},
		{"negative Csat", TrackerOptions{Csat: -5}, "pid csat -5"},
		{"negative MinScale", TrackerOptions{MinScale: -1}, "pid min scale -1"},
		{"negative Window", TrackerOptions{Window: -3}, "pid window -3"},
		{"huge Window", TrackerOptions{Window: MaxWindow + 1}, "pid window"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := New(0.5, Options{Method: "pid", Tracker: c.o})
			if err == nil || !strings.Contains(err.Error(), c.want) || !strings.HasPrefix(err.Error(), "conformal: ") {
				t.Fatalf("New: %v, want an error with %q", err, c.want)
			}
			defer func() {
				if recover() == nil {
					t.Error("NewTracker did not panic")
				}
			}()
			NewTracker(0.5, c.o)
		})
	}
}

func TestTrackerStateRoundTrip(t *testing.T) {
	tr := NewTracker(0.7, TrackerOptions{Window: 50, KI: -1})
	rng := rand.New(rand.NewPCG(1, 1))
	for range 80 { // more than the window: the ring has wrapped
		_, off := tr.Adjust()
		tr.Update(Outcome{Y: rng.NormFloat64(), Issued: off, PIT: math.NaN()})
	}
	b, _ := tr.MarshalBinary()
	var r Tracker // UnmarshalBinary makes the zero Tracker usable
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if again, _ := r.MarshalBinary(); !bytes.Equal(again, b) {
		t.Fatal("restored state encodes differently")
	}
	if r.Options().KI != 0 || r.Offset() != tr.Offset() || r.Scale() != tr.Scale() {
		t.Errorf("restored KI %v offset %v scale %v, want 0, %v, %v", r.Options().KI, r.Offset(), r.Scale(), tr.Offset(), tr.Scale())
	}
}

func TestTrackerStateRefusesBadData(t *testing.T) {
	tr := NewTracker(0.9, TrackerOptions{})
	tr.Update(Outcome{Y: 1, Issued: 0, PIT: math.NaN()})
	good, _ := tr.MarshalBinary()
	with := func(at int, v []byte) []byte {
		b := bytes.Clone(good)
		copy(b[at:], v)
		return b
	}
	f := func(i int, v float64) []byte { return with(1+8*i, appendFloat(nil, v)) }
	cases := []struct {
		name string
		data []byte
		want string
	}{
		{"empty", nil, "empty"},
		{"unknown version", with(0, []byte{7}), "unknown version 7"},
		{"short header", good[:20], "want at least"},
		{"missing error", good[:len(good)-8], "want"},
		{"level", f(0, 1), "level"},
		{"zero LR", f(1, 0), "must not be zero"},
		{"negative Eta", f(2, -1), "pid eta"},
		{"negative KI", f(3, -1), "ki"},
		{"NaN p", f(6, math.NaN()), "not finite"},
		{"S beyond MaxWeight t", f(7, 4.5), "accumulated error 4.5 after 1 outcomes"},
		{"window 0", with(1+8*8+8, appendUint32(nil, 0)), "must not be zero"},
		{"more errors than window", with(1+8*8+8+4, appendUint32(nil, 501)), "errors in a window"},
		{"NaN error", with(len(good)-8, appendFloat(nil, math.NaN())), "error NaN"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := NewTracker(0.5, TrackerOptions{})
			err := r.UnmarshalBinary(c.data)
			if !errors.Is(err, ErrState) || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v, want one wrapping ErrState that says %q", err, c.want)
			}
			if r.Level() != 0.5 || r.Offset() != 0 {
				t.Error("a failed restore changed the tracker")
			}
		})
	}
}

// FuzzTrackerUnmarshal: the decoder never panics, and a state it accepts
// encodes back to the same bytes.
func FuzzTrackerUnmarshal(f *testing.F) {
	tr := NewTracker(0.9, TrackerOptions{Window: 4})
	f.Add(func() []byte { b, _ := tr.MarshalBinary(); return b }())
	for i := range 6 {
		tr.Update(Outcome{Y: float64(i), Issued: 2, PIT: math.NaN()})
	}
	f.Add(func() []byte { b, _ := tr.MarshalBinary(); return b }())
	f.Add([]byte{1, 2, 3})
	f.Fuzz(func(t *testing.T, data []byte) {
		var r Tracker
		if !roundTrip(t, &r, data) {
			return
		}
		if _, off := r.Adjust(); math.IsNaN(off) {
			t.Errorf("accepted % x but adjusts by NaN", data)
		}
	})
}

func BenchmarkTrackerUpdateAdjust(b *testing.B) {
	for _, w := range []int{100, 500, 5000} {
		b.Run(fmt.Sprintf("window=%d", w), func(b *testing.B) {
			tr := NewTracker(0.9, TrackerOptions{Window: w})
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				l, off := tr.Adjust()
				tr.Update(Outcome{Y: float64(i%10) / 10, Issued: l + off, PIT: math.NaN()})
				i++
			}
		})
	}
}

// TestTrackerWeight: the P step and the integrator's sum scale with the
// outcome's weight (Outcome.Weight): from the same state, a miss of
// weight 2 moves the offset twice as far as one of weight 1 when the
// integrator is off, and with it on the integrator's sum S_t is the
// weighted sum of err - alpha.
func TestTrackerWeight(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 1))
	warm := make([]float64, 300)
	for i := range warm {
		warm[i] = rng.NormFloat64()
	}
	build := func(o TrackerOptions) *Tracker {
		tr := NewTracker(0.8, o)
		for _, y := range warm {
			_, off := tr.Adjust()
			tr.Update(Outcome{Y: y, Issued: normalQuantile(0.8) + off})
		}
		return tr
	}
	off := TrackerOptions{KI: -1}
	a, b := build(off), build(off)
	_, start := a.Adjust()
	miss := Outcome{Y: 10, Issued: normalQuantile(0.8) + start}
	a.Update(miss)
	miss.Weight = 2
	b.Update(miss)
	_, oa := a.Adjust()
	_, ob := b.Adjust()
	if da, db := oa-start, ob-start; !(da > 0) || math.Abs(db-2*da) > 1e-12*math.Abs(da) {
		t.Errorf("offset moved %v at weight 1, %v at weight 2", da, db)
	}
	c := build(TrackerOptions{})
	sum := c.sum
	c.Update(Outcome{Y: -10, Issued: 0, Weight: 0.5})
	if want := sum + 0.5*(0-0.2); math.Abs(c.sum-want) > 1e-12 {
		t.Errorf("S_t = %v after a hit of weight 1/2, want %v", c.sum, want)
	}
}
