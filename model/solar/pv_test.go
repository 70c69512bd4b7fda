package solar

import (
	"math"
	"testing"
	"time"
)

// TestPVPotentialDegrades checks the documented fallbacks of PVPotential;
// expected values follow by hand from its contract (horizontal plane:
// POA = ghi; derate 0.949701 at 800 W/m2, 20 C, 3 m/s from TestThermal)
// [computed].
func TestPVPotentialDegrades(t *testing.T) {
	at := time.Date(2023, 6, 10, 11, 0, 0, 0, time.UTC)
	nan := math.NaN()
	tests := []struct {
		name                                  string
		lat, lon, ghi, temp, wind, tilt, azim float64
		want                                  float64 // NaN: want NaN
	}{
		{"missing ghi", 46, 8, nan, 20, 3, 30, 180, nan},
		{"no light", 46, 8, 0, 20, 3, 30, 180, 0},
		{"negative reading", 46, 8, -4, 20, 3, 30, 180, 0},
		{"unknown tilt means horizontal, no temperature", 46, 8, 800, nan, 3, nan, 180, 0.8},
		{"unknown tilt means horizontal, derated", 46, 8, 800, 20, 3, nan, nan, 0.8 * 0.949701},
		{"flat plane", 46, 8, 800, nan, nan, 0, 180, 0.8},
		{"unknown location means horizontal", nan, nan, 800, nan, 3, 30, 180, 0.8},
		{"latitude out of range means horizontal", 123, 8, 800, nan, 3, 30, 180, 0.8},
		{"tilt out of range means horizontal", 46, 8, 800, nan, 3, 200, 180, 0.8},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := PVPotential(at, tc.lat, tc.lon, tc.ghi, tc.temp, tc.wind, tc.tilt, tc.azim)
			if math.IsNaN(tc.want) {
				if !math.IsNaN(got) {
					t.Errorf("got %v, want NaN", got)
				}
				return
			}
			if math.Abs(got-tc.want) > 1e-5 {
				t.Errorf("got %.6f, want %.6f", got, tc.want)
			}
		})
	}
}

// TestPVPotentialComposes checks that a tilted plane goes through the
// documented chain: Position with standard refraction, Erbs, Incidence, POA
// with the default albedo and the default derate.
func TestPVPotentialComposes(t *testing.T) {
	at := time.Date(2023, 4, 2, 9, 15, 0, 0, time.UTC)
	const lat, lon, ghi, temp, wind, tilt, azim = 44.2, 5.1, 540.0, 14.0, 4.5, 25.0, 200.0
	zen, az := Position(at, lat, lon)
	zen -= Refraction(90-zen, 1010, 10)
	dni, dhi := Erbs(at, ghi, zen)
	poa := POA(ghi, dni, dhi, zen, Incidence(zen, az, tilt, azim), tilt, DefaultAlbedo)
	want := poa * Thermal{}.Derate(poa, temp, wind) / 1000
	if got := PVPotential(at, lat, lon, ghi, temp, wind, tilt, azim); math.Abs(got-want) > 1e-12 {
		t.Errorf("PVPotential = %.9f, want %.9f", got, want)
	}
	if math.Abs(poa-ghi) < 1 {
		t.Errorf("tilted POA %.3f equals GHI %.3f: the case does not exercise the transposition", poa, ghi)
	}
}

// TestPVPotentialOrientation checks physics that any transposition must
// show: at winter noon under a clear sky (Haurwitz GHI), a plane tilted
// towards the equator gets more than a horizontal one, and one tilted away
// gets less; with unknown azimuth a tilted plane faces the equator in both
// hemispheres.
func TestPVPotentialOrientation(t *testing.T) {
	tests := []struct {
		name     string
		at       time.Time
		lat, lon float64
		equator  float64 // azimuth of the equator-facing plane
	}{
		{"north, December noon", time.Date(2023, 12, 21, 11, 30, 0, 0, time.UTC), 45.5, 7, 180},
		{"south, June noon", time.Date(2023, 6, 21, 4, 0, 0, 0, time.UTC), -33.5, 151, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			zen, _ := Position(tc.at, tc.lat, tc.lon)
			ghi := Haurwitz(zen)
			flat := PVPotential(tc.at, tc.lat, tc.lon, ghi, math.NaN(), math.NaN(), 0, math.NaN())
			toward := PVPotential(tc.at, tc.lat, tc.lon, ghi, math.NaN(), math.NaN(), 40, tc.equator)
			away := PVPotential(tc.at, tc.lat, tc.lon, ghi, math.NaN(), math.NaN(), 40, math.Mod(tc.equator+180, 360))
			guessed := PVPotential(tc.at, tc.lat, tc.lon, ghi, math.NaN(), math.NaN(), 40, math.NaN())
			if !(toward > 1.2*flat && away < flat) {
				t.Errorf("towards the equator %.4f, flat %.4f, away %.4f: want towards > 1.2 flat > away", toward, flat, away)
			}
			if guessed != toward {
				t.Errorf("unknown azimuth gave %.6f, the equator-facing plane %.6f", guessed, toward)
			}
		})
	}
}
