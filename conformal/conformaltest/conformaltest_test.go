package conformaltest

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/plumb-forecast/plumb/conformal"
)

// The suite must fail broken calibrators: each case is a calibrator with one
// defect and the check that must catch it.

// shifted always asks for level+delta and learns nothing.
type shifted struct{ level, delta float64 }

func (s *shifted) Name() string               { return "shifted" }
func (s *shifted) Adjust() (float64, float64) { return s.level + s.delta, 0 }
func (s *shifted) Update(conformal.Outcome)   {}
func newShifted(delta float64) func(float64) conformal.Calibrator {
	return func(l float64) conformal.Calibrator { return &shifted{level: l, delta: delta} }
}

// unnamed has an empty name.
type unnamed struct{ *shifted }

func (unnamed) Name() string { return "" }

// nanAfter returns NaN once it has seen n outcomes.
type nanAfter struct {
	level float64
	seen  int
}

func (c *nanAfter) Name() string { return "nan-after" }
func (c *nanAfter) Adjust() (float64, float64) {
	if c.seen >= 100 {
		return math.NaN(), 0
	}
	return c.level, 0
}
func (c *nanAfter) Update(conformal.Outcome) { c.seen++ }

// drifting changes its answer on every Adjust call.
type drifting struct{ level, calls float64 }

func (c *drifting) Name() string { return "drifting" }
func (c *drifting) Adjust() (float64, float64) {
	c.calls++
	return c.level, c.calls * 1e-9
}
func (c *drifting) Update(conformal.Outcome) {}

// offCorrector tells a correction a hair off the one Adjust gives.
type offCorrector struct{ *conformal.ACI }

func (c offCorrector) Correction() (float64, float64) {
	l, o := c.ACI.Correction()
	return l + 1e-9, o
}

// nudging learns each outcome twice once its correction was asked.
type nudging struct {
	*conformal.ACI
	asked bool
}

func (c *nudging) Correction() (float64, float64) {
	c.asked = true
	return c.ACI.Correction()
}
func (c *nudging) Update(o conformal.Outcome) {
	c.ACI.Update(o)
	if c.asked {
		c.ACI.Update(o)
	}
	c.asked = false
}

// rawWeight is an ACI that takes every weight as given, an unusable one
// (NaN, negative, infinite) included.
type rawWeight struct{ *conformal.ACI }

func (c rawWeight) Update(o conformal.Outcome) {
	if o.Weight == 0 {
		c.ACI.Update(o)
		return
	}
	// Weight w as w updates of weight 1 would be; NaN or negative: none.
	for k := 0.0; k < o.Weight && k < 3; k++ {
		o2 := o
		o2.Weight = 0
		c.ACI.Update(o2)
	}
}

// forgetful is an ACI whose state drops alpha_t (restores the initial one).
type forgetful struct{ *conformal.ACI }

func (f forgetful) MarshalBinary() ([]byte, error) {
	return f.ACI.MarshalBinary()
}

func (f forgetful) UnmarshalBinary(data []byte) error {
	if err := f.ACI.UnmarshalBinary(data); err != nil {
		return err
	}
	// Rewrite alpha_t with 1 - level, as if the state lost it.
	fresh, _ := conformal.NewACI(f.Level(), conformal.ACIOptions{Gamma: f.Gamma()}).MarshalBinary()
	return f.ACI.UnmarshalBinary(fresh)
}

// marshalOnly can be saved but not restored.
type marshalOnly struct{ *conformal.None }

func (m marshalOnly) MarshalBinary() ([]byte, error) { return m.None.MarshalBinary() }

func (m marshalOnly) UnmarshalBinary() {} // not the encoding.BinaryUnmarshaler method

func TestSuiteCatchesDefects(t *testing.T) {
	aci := func(l float64) conformal.Calibrator { return conformal.NewACI(l, conformal.ACIOptions{}) }
	cases := []struct {
		name   string
		newCal func(float64) conformal.Calibrator
		opt    Options
		fn     func(func(float64) conformal.Calibrator, Options) error
		want   string
	}{
		{"empty name", func(l float64) conformal.Calibrator { return unnamed{&shifted{level: l}} }, Options{}, checkName, "Name is empty"},
		{"NaN level", func(l float64) conformal.Calibrator { return &nanAfter{level: l} }, Options{}, checkNeverNaN, "Adjust returned (NaN"},
		{"Adjust changes state", func(l float64) conformal.Calibrator { return &drifting{level: l} }, Options{}, checkDeterministic, "repeated Adjust"},
		{"biased, correctly specified", newShifted(-0.1), Options{}, checkCoverageCorrect, "correctly specified"},
		{"identity held to correction", func(l float64) conformal.Calibrator { return conformal.NewNone(l) }, Options{}, checkCoverageShifted, "shifted by +1 sd"},
		{"biased identity", newShifted(0.1), Options{NoCorrection: true}, checkCoverageShifted, "uncorrected forecaster"},
		{"state loses alpha_t", func(l float64) conformal.Calibrator { return forgetful{aci(l).(*conformal.ACI)} }, Options{}, checkRoundTrip, "after the restore"},
		{"no unmarshaler", func(l float64) conformal.Calibrator { return marshalOnly{conformal.NewNone(l)} }, Options{}, checkRoundTrip, "not encoding.BinaryUnmarshaler"},
		{"correction off by a hair", func(l float64) conformal.Calibrator { return offCorrector{aci(l).(*conformal.ACI)} }, Options{}, checkCorrection, "Correction ("},
		{"weight taken as given", func(l float64) conformal.Calibrator { return rawWeight{aci(l).(*conformal.ACI)} }, Options{}, checkUnitWeight, "weight NaN"},
		{"correction with a side effect", func(l float64) conformal.Calibrator { return &nudging{aci(l).(*conformal.ACI), false} }, Options{}, checkCorrection, "changed Adjust"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := c.fn(c.newCal, c.opt)
			if err == nil {
				t.Fatalf("the check passed a defective calibrator")
			}
			if !strings.Contains(err.Error(), c.want) {
				t.Errorf("error %q does not mention %q", err, c.want)
			}
		})
	}
}

func TestCheckJoinsFailures(t *testing.T) {
	err := Check(newShifted(-0.1), Options{})
	if err == nil {
		t.Fatal("Check passed a calibrator biased by -0.1")
	}
	for _, want := range []string{"CoverageCorrectlySpecified:", "CoverageMisspecified:"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("Check's error lacks %q: %v", want, err)
		}
	}
	if errors.Is(err, errSkip) {
		t.Errorf("Check reported a skipped check as a failure: %v", err)
	}
}

func TestCheckPassesConformingCalibrators(t *testing.T) {
	cases := []struct {
		name   string
		newCal func(float64) conformal.Calibrator
		opt    Options
	}{
		{"aci", func(l float64) conformal.Calibrator { return conformal.NewACI(l, conformal.ACIOptions{}) }, Options{}},
		{"none", func(l float64) conformal.Calibrator { return conformal.NewNone(l) }, Options{NoCorrection: true}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if err := Check(c.newCal, c.opt); err != nil {
				t.Errorf("Check: %v", err)
			}
		})
	}
}
