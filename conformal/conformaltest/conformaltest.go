// Package conformaltest is the conformance suite every conformal.Calibrator
// must pass, in the manner of testing/slogtest for slog handlers.
//
// The suite drives the calibrator in a closed loop with a synthetic
// forecaster whose quantile at level l is the standard normal quantile
// Phi^-1(l) (-Inf at or below 0, +Inf at or above 1): each step it asks the
// calibrator for a level and an offset, issues Phi^-1(level) + offset, draws
// an outcome from a seeded source and feeds it back at once. It checks:
//
//   - Name is not empty.
//   - Adjust never returns NaN (finite or +-Inf only), also after extreme
//     outcomes, and is deterministic: repeated calls without an update agree,
//     and two calibrators fed the same outcomes agree bit for bit.
//   - On i.i.d. N(0, 1) outcomes (a correctly specified forecaster) the
//     long-run coverage stays within 2 percentage points of the level, for
//     levels 0.05, 0.5 and 0.95.
//   - On N(1, 1) outcomes (the forecaster is off by one standard deviation)
//     the long-run coverage comes within 2 percentage points of the level;
//     a calibrator not meant to correct (Options.NoCorrection, like "none")
//     must instead leave the forecaster's own coverage Phi(Phi^-1(l) - 1)
//     as it is, within the same 2 points.
//   - If the calibrator implements encoding.BinaryMarshaler, it must also
//     implement encoding.BinaryUnmarshaler, refuse empty data, and a
//     calibrator restored from its state must behave exactly as the
//     original on the same future outcomes.
//
// Long-run coverage is the share of hits over all 20000 steps of a run.
package conformaltest

import (
	"encoding"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"github.com/plumb-forecast/plumb/conformal"
)

// Options adjusts the suite to the calibrator under test. The zero value
// holds the calibrator to every check.
type Options struct {
	// NoCorrection marks a calibrator that is not meant to correct a
	// mis-specified forecaster, such as the identity "none". The
	// mis-specified check then requires the forecaster's own coverage to be
	// left as it is instead of brought to the level.
	NoCorrection bool
}

// Steps is the length of each simulated run.
const Steps = 20000

// Tolerance is the allowed distance of long-run coverage from its target.
const Tolerance = 0.02

// levels are the levels the coverage checks run at.
var levels = []float64{0.05, 0.5, 0.95}

// Run runs the suite on calibrators built by newCal, which must return a
// fresh calibrator of the given level each call, holding it to every check.
func Run(t *testing.T, newCal func(level float64) conformal.Calibrator) {
	t.Helper()
	RunWith(t, newCal, Options{})
}

// RunWith runs the suite with options, each check as a subtest.
func RunWith(t *testing.T, newCal func(level float64) conformal.Calibrator, o Options) {
	t.Helper()
	for _, c := range checks {
		t.Run(c.name, func(t *testing.T) {
			err := c.fn(newCal, o)
			if errors.Is(err, errSkip) {
				t.Skip(err)
			}
			if err != nil {
				t.Error(err)
			}
		})
	}
}

// Check runs the suite outside a test and returns every failure joined, or
// nil when the calibrator conforms.
func Check(newCal func(level float64) conformal.Calibrator, o Options) error {
	var errs []error
	for _, c := range checks {
		if err := c.fn(newCal, o); err != nil && !errors.Is(err, errSkip) {
			errs = append(errs, fmt.Errorf("%s: %w", c.name, err))
		}
	}
	return errors.Join(errs...)
}

// errSkip marks a check that does not apply to the calibrator.
var errSkip = errors.New("conformaltest: check does not apply")

type check struct {
	name string
	fn   func(newCal func(float64) conformal.Calibrator, o Options) error
}

var checks = []check{
	{"Name", checkName},
	{"AdjustNeverNaN", checkNeverNaN},
	{"Deterministic", checkDeterministic},
	{"CoverageCorrectlySpecified", checkCoverageCorrect},
	{"CoverageMisspecified", checkCoverageShifted},
	{"StateRoundTrip", checkRoundTrip},
	{"CorrectionIsAdjust", checkCorrection},
	{"UnitWeightIsUnweighted", checkUnitWeight},
}

// checkUnitWeight: an outcome of Weight 1, or of a weight that is not
// positive and finite, updates a calibrator exactly as one with no weight
// (the zero value), so a caller that never weighs changes nothing.
func checkUnitWeight(newCal func(float64) conformal.Calibrator, _ Options) error {
	for _, level := range levels {
		for _, w := range []float64{1, math.NaN(), -1, math.Inf(1)} {
			a, b := newCal(level), newCal(level)
			rng := source(5, level)
			for i := range 2000 {
				y := 0.5 + rng.NormFloat64()
				for k, c := range []conformal.Calibrator{a, b} {
					l, off := c.Adjust()
					o := conformal.Outcome{Y: y, Issued: quantile(l) + off, PIT: math.NaN()}
					if k == 1 {
						o.Weight = w
					}
					c.Update(o)
				}
				la, oa := a.Adjust()
				if lb, ob := b.Adjust(); !same(la, oa, lb, ob) {
					return fmt.Errorf("level %v: after %d outcomes, unweighted Adjust gave (%v, %v), weight %v (%v, %v)", level, i+1, la, oa, w, lb, ob)
				}
			}
		}
	}
	return nil
}

// checkCorrection: a calibrator that implements conformal.Corrector tells
// the answer Adjust gives next, and asking changes nothing it does after.
func checkCorrection(newCal func(float64) conformal.Calibrator, _ Options) error {
	if _, ok := newCal(0.5).(conformal.Corrector); !ok {
		return fmt.Errorf("%w: no Correction method", errSkip)
	}
	for _, level := range levels {
		a, b := newCal(level), newCal(level)
		rng := source(3, level)
		for i := range 2000 {
			l, o := a.(conformal.Corrector).Correction()
			la, oa := a.Adjust()
			lb, ob := b.Adjust()
			if !same(l, o, la, oa) {
				return fmt.Errorf("level %v, outcome %d: Correction (%v, %v), Adjust (%v, %v)", level, i, l, o, la, oa)
			}
			if !same(la, oa, lb, ob) {
				return fmt.Errorf("level %v, outcome %d: asking Correction changed Adjust: (%v, %v) against (%v, %v)", level, i, la, oa, lb, ob)
			}
			y := 0.5 + 1.5*rng.NormFloat64()
			out := conformal.Outcome{Y: y, Issued: quantile(la) + oa, PIT: 0.5}
			a.Update(out)
			b.Update(out)
		}
	}
	return nil
}

// quantile is the synthetic forecaster: the N(0, 1) quantile at level l.
func quantile(l float64) float64 {
	switch {
	case math.IsNaN(l):
		return math.NaN()
	case l <= 0:
		return math.Inf(-1)
	case l >= 1:
		return math.Inf(1)
	}
	return distuv.UnitNormal.Quantile(l)
}

// step asks cal for a forecast, settles it with outcome y and reports the hit.
func step(cal conformal.Calibrator, y float64) bool {
	level, offset := cal.Adjust()
	o := conformal.Outcome{Y: y, Issued: quantile(level) + offset, PIT: distuv.UnitNormal.CDF(y)}
	cal.Update(o)
	return o.Hit()
}

// source returns the seeded outcome source of a check and level.
func source(seed uint64, level float64) *rand.Rand {
	return rand.New(rand.NewPCG(seed, math.Float64bits(level)))
}

func checkName(newCal func(float64) conformal.Calibrator, _ Options) error {
	if newCal(0.5).Name() == "" {
		return errors.New("Name is empty")
	}
	return nil
}

// checkNeverNaN drives each level through ordinary, extreme and unknown
// outcomes and requires Adjust to stay free of NaN.
func checkNeverNaN(newCal func(float64) conformal.Calibrator, _ Options) error {
	for _, level := range []float64{0.01, 0.05, 0.5, 0.95, 0.99} {
		cal := newCal(level)
		rng := source(1, level)
		phases := []struct {
			name string
			y    func() float64
		}{
			{"ordinary", rng.NormFloat64},
			{"far above", func() float64 { return 1e6 }},
			{"far below", func() float64 { return -1e6 }},
			{"alternating extremes", func() float64 { return 1e6 * float64(1-2*rng.IntN(2)) }},
		}
		for _, p := range phases {
			for i := range 3000 {
				if l, off := cal.Adjust(); math.IsNaN(l) || math.IsNaN(off) {
					return fmt.Errorf("level %v: Adjust returned (%v, %v) at step %d of %s outcomes", level, l, off, i, p.name)
				}
				step(cal, p.y())
			}
		}
		// An outcome with an unknown PIT must not poison the state either.
		l, off := cal.Adjust()
		cal.Update(conformal.Outcome{Y: 0, Issued: quantile(l) + off, PIT: math.NaN()})
		if l, off := cal.Adjust(); math.IsNaN(l) || math.IsNaN(off) {
			return fmt.Errorf("level %v: Adjust returned (%v, %v) after an outcome with unknown PIT", level, l, off)
		}
	}
	return nil
}

// same reports whether two Adjust answers agree bit for bit.
func same(l1, o1, l2, o2 float64) bool {
	return math.Float64bits(l1) == math.Float64bits(l2) && math.Float64bits(o1) == math.Float64bits(o2)
}

func checkDeterministic(newCal func(float64) conformal.Calibrator, _ Options) error {
	for _, level := range levels {
		a, b := newCal(level), newCal(level)
		l0, o0 := a.Adjust()
		for range 3 {
			if l, o := a.Adjust(); !same(l, o, l0, o0) {
				return fmt.Errorf("level %v: repeated Adjust without update gave (%v, %v) then (%v, %v)", level, l0, o0, l, o)
			}
		}
		if l, o := b.Adjust(); !same(l, o, l0, o0) {
			return fmt.Errorf("level %v: two fresh calibrators adjust to (%v, %v) and (%v, %v)", level, l0, o0, l, o)
		}
		rng := source(2, level)
		for i := range 2000 {
			y := 0.5 + rng.NormFloat64()
			step(a, y)
			step(b, y)
			la, oa := a.Adjust()
			if lb, ob := b.Adjust(); !same(la, oa, lb, ob) {
				return fmt.Errorf("level %v: after %d identical outcomes Adjust gave (%v, %v) and (%v, %v)", level, i+1, la, oa, lb, ob)
			}
		}
	}
	return nil
}

// coverage runs a calibrator of the level for Steps outcomes N(shift, 1)
// and returns the share of hits.
func coverage(cal conformal.Calibrator, level, shift float64, seed uint64) float64 {
	rng := source(seed, level)
	hits := 0
	for range Steps {
		if step(cal, shift+rng.NormFloat64()) {
			hits++
		}
	}
	return float64(hits) / Steps
}

func checkCoverageCorrect(newCal func(float64) conformal.Calibrator, _ Options) error {
	var errs []error
	for _, level := range levels {
		if c := coverage(newCal(level), level, 0, 3); math.Abs(c-level) > Tolerance {
			errs = append(errs, fmt.Errorf("level %v: long-run coverage %.4f on a correctly specified forecaster, want within %v", level, c, Tolerance))
		}
	}
	return errors.Join(errs...)
}

func checkCoverageShifted(newCal func(float64) conformal.Calibrator, o Options) error {
	var errs []error
	for _, level := range levels {
		c := coverage(newCal(level), level, 1, 4)
		want, what := level, "the level"
		if o.NoCorrection {
			want, what = distuv.UnitNormal.CDF(quantile(level)-1), "the uncorrected forecaster's coverage"
		}
		if math.Abs(c-want) > Tolerance {
			errs = append(errs, fmt.Errorf("level %v: long-run coverage %.4f with outcomes shifted by +1 sd, want within %v of %s %.4f", level, c, Tolerance, what, want))
		}
	}
	return errors.Join(errs...)
}

func checkRoundTrip(newCal func(float64) conformal.Calibrator, _ Options) error {
	if _, ok := newCal(0.5).(encoding.BinaryMarshaler); !ok {
		return fmt.Errorf("%w: the calibrator does not implement encoding.BinaryMarshaler", errSkip)
	}
	for _, level := range levels {
		orig := newCal(level)
		rng := source(5, level)
		for range 500 {
			step(orig, 1+rng.NormFloat64())
		}
		state, err := orig.(encoding.BinaryMarshaler).MarshalBinary()
		if err != nil {
			return fmt.Errorf("level %v: MarshalBinary: %w", level, err)
		}
		restored := newCal(level)
		u, ok := restored.(encoding.BinaryUnmarshaler)
		if !ok {
			return errors.New("the calibrator implements encoding.BinaryMarshaler but not encoding.BinaryUnmarshaler")
		}
		if err := u.UnmarshalBinary(nil); err == nil {
			return errors.New("UnmarshalBinary accepted empty data")
		}
		if err := u.UnmarshalBinary(state); err != nil {
			return fmt.Errorf("level %v: UnmarshalBinary of its own state: %w", level, err)
		}
		if restored.Name() != orig.Name() {
			return fmt.Errorf("level %v: restored calibrator is named %q, want %q", level, restored.Name(), orig.Name())
		}
		for i := range 2000 {
			lo, oo := orig.Adjust()
			if lr, or := restored.Adjust(); !same(lo, oo, lr, or) {
				return fmt.Errorf("level %v: %d outcomes after the restore Adjust gave (%v, %v), the original (%v, %v)", level, i, lr, or, lo, oo)
			}
			y := 1 + rng.NormFloat64()
			step(orig, y)
			step(restored, y)
		}
	}
	return nil
}
