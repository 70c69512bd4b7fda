package conformal_test

import (
	"fmt"
	"testing"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/conformal/conformaltest"
)

func TestConformanceACI(t *testing.T) {
	for _, gamma := range []float64{0, 0.05} {
		t.Run(fmt.Sprintf("gamma=%v", gamma), func(t *testing.T) {
			conformaltest.Run(t, func(level float64) conformal.Calibrator {
				return conformal.NewACI(level, conformal.ACIOptions{Gamma: gamma})
			})
		})
	}
}

func TestConformanceNone(t *testing.T) {
	conformaltest.RunWith(t, func(level float64) conformal.Calibrator {
		return conformal.NewNone(level)
	}, conformaltest.Options{NoCorrection: true})
}

func TestConformanceTracker(t *testing.T) {
	cases := []struct {
		name string
		o    conformal.TrackerOptions
	}{
		{"default", conformal.TrackerOptions{}},
		{"LR 0.01 without integrator", conformal.TrackerOptions{LR: 0.01, KI: -1}},
		{"fixed step 0.05", conformal.TrackerOptions{Eta: 0.05}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			conformaltest.Run(t, func(level float64) conformal.Calibrator {
				return conformal.NewTracker(level, c.o)
			})
		})
	}
}

func TestConformanceDtACI(t *testing.T) {
	cases := []struct {
		name string
		o    conformal.DtACIOptions
	}{
		{"default", conformal.DtACIOptions{}},
		{"four experts from 0.005, sigma 0.01", conformal.DtACIOptions{MinGamma: 0.005, Experts: 4, Sigma: 0.01}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			conformaltest.Run(t, func(level float64) conformal.Calibrator {
				return conformal.NewDtACI(level, c.o)
			})
		})
	}
}

func TestConformanceSplit(t *testing.T) {
	for _, window := range []int{0, 100} {
		t.Run(fmt.Sprintf("window=%d", window), func(t *testing.T) {
			conformaltest.Run(t, func(level float64) conformal.Calibrator {
				return conformal.NewSplit(level, conformal.SplitOptions{Window: window})
			})
		})
	}
}

// TestConformanceFactory runs the suite on every method New knows.
func TestConformanceFactory(t *testing.T) {
	for _, m := range conformal.Methods() {
		t.Run(m, func(t *testing.T) {
			conformaltest.RunWith(t, func(level float64) conformal.Calibrator {
				cal, err := conformal.New(level, conformal.Options{Method: m})
				if err != nil {
					t.Fatal(err)
				}
				return cal
			}, conformaltest.Options{NoCorrection: m == conformal.MethodNone})
		})
	}
}
