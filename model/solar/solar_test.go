package solar

import (
	"math"
	"testing"
	"time"
)

// TestSunPositionSPAExample holds the NOAA series to the worked example of
// the Solar Position Algorithm: METHODS.md section 1, Reda and Andreas,
// Solar Energy 76(5), 2004 (NREL TP-560-34302). 17 October 2003 12:30:30 at
// UTC-7, lat 39.742476, lon -105.1786, 820 hPa, 11 C: topocentric zenith
// 50.11162 deg (refraction included), azimuth 194.34024 deg. METHODS.md
// accepts a simpler algorithm within 0.05 deg.
func TestSunPositionSPAExample(t *testing.T) {
	at := time.Date(2003, 10, 17, 19, 30, 30, 0, time.UTC)
	zen, az := Position(at, 39.742476, -105.1786)
	zen -= Refraction(90-zen, 820, 11)
	const wantZen, wantAz = 50.11162, 194.34024 // Reda and Andreas 2004, worked example, via METHODS.md section 1 [paper]
	if math.Abs(zen-wantZen) > 0.05 || math.Abs(az-wantAz) > 0.05 {
		t.Errorf("zenith %.5f, azimuth %.5f; want %.5f, %.5f within 0.05 deg", zen, az, wantZen, wantAz)
	}
	t.Logf("zenith %.5f (%+.5f), azimuth %.5f (%+.5f)", zen, zen-wantZen, az, az-wantAz)
}

// TestHaurwitz checks the clear-sky formula of METHODS.md section 1
// (Haurwitz 1945, formula [memory] there); values [computed] with a
// short script from 1098 cos z exp(-0.059 / cos z).
func TestHaurwitz(t *testing.T) {
	tests := []struct {
		name   string
		zenith float64
		want   float64
	}{
		{"overhead", 0, 1035.0920},
		{"zenith 30", 30, 888.2713},
		{"zenith 60", 60, 487.8941},
		{"zenith 85", 85, 48.6299},
		{"horizon", 90, 0},
		{"below horizon", 100, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := Haurwitz(tc.zenith); math.Abs(got-tc.want) > 1e-3 {
				t.Errorf("haurwitz(%v) = %.4f, want %.4f", tc.zenith, got, tc.want)
			}
		})
	}
}
