package solar

import (
	"math"
	"testing"
)

// TestThermal checks the Faiman cell temperature and the derate against
// values recomputed by hand from Tc = Ta + E / (U0 + U1 w) and
// 1 + gamma (Tc - 25), with the default coefficients U0 = 25, U1 = 6.84
// [memory] and gamma = -0.004 (common practice) [computed].
func TestThermal(t *testing.T) {
	tests := []struct {
		name                 string
		th                   Thermal
		poa, tempC, wind     float64
		wantCell, wantDerate float64
	}{
		// 20 + 800 / (25 + 6.84 * 3) = 37.574692; 1 - 0.004 * 12.574692
		{"defaults", Thermal{}, 800, 20, 3, 37.574692, 0.949701},
		{"explicit defaults", Thermal{U0: 25, U1: 6.84, Gamma: -0.004}, 800, 20, 3, 37.574692, 0.949701},
		// NaN wind means 1 m/s: 20 + 800 / 31.84 = 45.125628
		{"missing wind", Thermal{}, 800, 20, math.NaN(), 45.125628, 0.919497},
		// 10 + 1000 / (30 + 5 * 2) = 35; 1 - 0.003 * 10
		{"custom module", Thermal{U0: 30, U1: 5, Gamma: -0.003}, 1000, 10, 2, 35, 0.97},
		// dark and cold: cell at air temperature, gain above 1
		{"dark and cold", Thermal{}, 0, -5, 4, -5, 1.12},
		// negative wind taken as calm: 30 + 500 / 25 = 50
		{"negative wind", Thermal{}, 500, 30, -3, 50, 0.9},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := tc.th.CellTemp(tc.poa, tc.tempC, tc.wind); math.Abs(got-tc.wantCell) > 1e-5 {
				t.Errorf("CellTemp = %.6f, want %.6f", got, tc.wantCell)
			}
			if got := tc.th.Derate(tc.poa, tc.tempC, tc.wind); math.Abs(got-tc.wantDerate) > 1e-5 {
				t.Errorf("Derate = %.6f, want %.6f", got, tc.wantDerate)
			}
		})
	}
}

// TestThermalMissingTemperature: without an air temperature there is no
// cell temperature and no derate.
func TestThermalMissingTemperature(t *testing.T) {
	var th Thermal
	if got := th.CellTemp(800, math.NaN(), 2); !math.IsNaN(got) {
		t.Errorf("CellTemp with NaN air temperature = %v, want NaN", got)
	}
	if got := th.Derate(800, math.NaN(), 2); got != 1 {
		t.Errorf("Derate with NaN air temperature = %v, want 1", got)
	}
	if got := th.Derate(math.NaN(), 20, 2); got != 1 {
		t.Errorf("Derate with NaN irradiance = %v, want 1", got)
	}
}

// TestThermalDerateFloor: an absurd temperature cannot make power negative.
func TestThermalDerateFloor(t *testing.T) {
	if got := (Thermal{Gamma: -0.05}).Derate(1000, 60, 0); got != 0 {
		t.Errorf("Derate at 100 C with gamma -0.05 = %v, want 0", got)
	}
}
