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
