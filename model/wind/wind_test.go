package wind

import (
	"math"
	"testing"
)

// TestShearExponent checks a = ln(v2/v1) / ln(h2/h1) (METHODS.md section 2,
// formula [memory]) on values computed by hand.
func TestShearExponent(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name           string
		v1, h1, v2, h2 float64
		want           float64 // NaN: want NaN
	}{
		{"5 m/s at 10 m, 6 m/s at 50 m", 5, 10, 6, 50, 0.1132828}, // ln 1.2 / ln 5 [computed]
		{"order of the heights does not matter", 6, 50, 5, 10, 0.1132828},
		{"one-seventh law recovered", 5, 10, 5 * math.Pow(8, 1.0/7), 80, 1.0 / 7},
		{"no shear", 7, 40, 7, 100, 0},
		{"speed decreasing with height", 8, 60, 7, 100, -0.2614031}, // ln(7/8) / ln(100/60) [computed]
		{"equal heights", 5, 10, 6, 10, nan},
		{"calm lower anemometer", 0, 10, 6, 50, nan},
		{"missing speed", nan, 10, 6, 50, nan},
		{"missing height", 5, 10, 6, nan, nan},
		{"negative height", 5, -10, 6, 50, nan},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := ShearExponent(tc.v1, tc.h1, tc.v2, tc.h2)
			checkClose(t, got, tc.want, 1e-6)
		})
	}
}

// TestHubSpeed checks v (hub/h)^alpha (METHODS.md section 2 [memory]) on
// values computed by hand, and that missing inputs leave v as is.
func TestHubSpeed(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name             string
		v, h, hub, alpha float64
		want             float64
	}{
		{"one-seventh law, 10 m to 80 m", 5, 10, 80, DefaultShear, 6.7295010}, // 5 * 8^(1/7) [computed]
		{"measured exponent, 50 m to 100 m", 6, 50, 100, 0.2, 6.8921901},      // 6 * 2^0.2 [computed]
		{"down to a lower hub", 8, 100, 50, 0.25, 6.7271713},                  // 8 * 0.5^0.25 [computed]
		{"same height", 7, 80, 80, 0.3, 7},
		{"missing exponent", 7, 10, 80, nan, 7},
		{"missing hub height", 7, 10, nan, 0.14, 7},
		{"missing measurement height", 7, nan, 80, 0.14, 7},
		{"zero measurement height", 7, 0, 80, 0.14, 7},
		{"missing speed", nan, 10, 80, 0.14, nan},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			checkClose(t, HubSpeed(tc.v, tc.h, tc.hub, tc.alpha), tc.want, 1e-6)
		})
	}
}

// TestAirDensity checks rho = p / (R_d T), R_d = 287.05 (METHODS.md section
// 2 [memory]); the standard atmosphere at sea level (1013.25 hPa, 15 C) has
// 1.225 kg/m3 [memory], which the formula reproduces to 1.22501 [computed].
func TestAirDensity(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name     string
		p, tempC float64
		want     float64
	}{
		{"standard sea level", 1013.25, 15, 1.2250123}, // 101325 / (287.05 * 288.15) [computed]
		{"cold upland", 900, -5, 1.1692494},            // 90000 / (287.05 * 268.15) [computed]
		{"hot lowland", 1005, 35, 1.1361779},           // 100500 / (287.05 * 308.15) [computed]
		{"missing pressure", nan, 15, nan},
		{"missing temperature", 1013.25, nan, nan},
		{"below absolute zero", 1013.25, -300, nan},
		{"zero pressure", 0, 15, nan},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			checkClose(t, AirDensity(tc.p, tc.tempC), tc.want, 1e-6)
		})
	}
}

// TestNormalizeSpeed checks v (rho / 1.225)^(1/3) (IEC 61400-12-1 via
// METHODS.md section 2 [memory]) on values computed by hand.
func TestNormalizeSpeed(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name   string
		v, rho float64
		want   float64
	}{
		{"thin air slows the equivalent speed", 10, 1.1, 9.6475906}, // 10 * (1.1/1.225)^(1/3) [computed]
		{"dense air", 8, 1.3, 8.1600423},                            // 8 * (1.3/1.225)^(1/3) [computed]
		{"reference density", 12, RefDensity, 12},
		{"missing density", 10, nan, 10},
		{"negative density", 10, -1, 10},
		{"missing speed", nan, 1.2, nan},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			checkClose(t, NormalizeSpeed(tc.v, tc.rho), tc.want, 1e-6)
		})
	}
}

// checkClose fails unless got is within tol of want, or both are NaN.
func checkClose(t *testing.T, got, want, tol float64) {
	t.Helper()
	if math.IsNaN(want) {
		if !math.IsNaN(got) {
			t.Errorf("got %v, want NaN", got)
		}
		return
	}
	if !(math.Abs(got-want) <= tol) {
		t.Errorf("got %.7f, want %.7f within %g", got, want, tol)
	}
}
