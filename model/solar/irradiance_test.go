package solar

import (
	"math"
	"testing"
	"time"
)

// spaTime is the worked example's instant: 17 October 2003 12:30:30 at UTC-7
// (METHODS.md section 1, Reda and Andreas 2004).
var spaTime = time.Date(2003, 10, 17, 19, 30, 30, 0, time.UTC)

// TestIncidenceSPAExample holds Incidence to the worked example of the Solar
// Position Algorithm (METHODS.md section 1, Reda and Andreas 2004, eq. 47):
// topocentric zenith 50.11162, azimuth 194.34024 (east of north), slope 30,
// surface azimuth rotation -10. In the paper gamma is measured from south,
// positive towards the west and negative towards the east, so -10 is a plane
// facing 10 degrees east of south: 170 degrees east of north here. The paper
// gives 25.18700 degrees [paper]; recomputing eq. 47 gives 25.186998.
func TestIncidenceSPAExample(t *testing.T) {
	const wantInc = 25.18700 // Reda and Andreas 2004, worked example [paper]
	got := Incidence(50.11162, 194.34024, 30, 180+(-10))
	if math.Abs(got-wantInc) > 1e-4 {
		t.Errorf("incidence = %.5f, want %.5f within 1e-4", got, wantInc)
	}
	// A plane turned 10 degrees west of south instead (gamma = +10) must
	// not match: this is what pins the sign convention.
	if other := Incidence(50.11162, 194.34024, 30, 190); math.Abs(other-wantInc) < 1 {
		t.Errorf("incidence with the plane turned west = %.5f, too close to %.5f: sign convention lost", other, wantInc)
	}
}

// TestIncidenceSPAExampleViaPosition runs the same example through Position
// (NOAA series) and Refraction at 820 hPa and 11 C, as the paper's
// topocentric zenith includes refraction; METHODS.md section 1 accepts 0.05
// degrees of departure from 25.18700 [paper].
func TestIncidenceSPAExampleViaPosition(t *testing.T) {
	zen, az := Position(spaTime, 39.742476, -105.1786)
	zen -= Refraction(90-zen, 820, 11)
	got := Incidence(zen, az, 30, 170)
	const wantInc = 25.18700 // Reda and Andreas 2004, worked example [paper]
	if math.Abs(got-wantInc) > 0.05 {
		t.Errorf("incidence = %.5f, want %.5f within 0.05 deg", got, wantInc)
	}
	t.Logf("incidence %.5f (%+.5f)", got, got-wantInc)
}

// TestIncidenceGeometry checks cases whose answer follows from the geometry
// alone [computed by hand].
func TestIncidenceGeometry(t *testing.T) {
	tests := []struct {
		name                 string
		zen, az, tilt, surfA float64
		want                 float64
	}{
		{"horizontal plane sees the zenith angle", 37, 123, 0, 200, 37},
		{"plane facing the sun", 40, 150, 40, 150, 0},
		{"east wall, sun rising due east", 90, 90, 90, 90, 0},
		{"south wall, sun due north on the horizon", 90, 0, 90, 180, 180},
		{"south wall, sun due west on the horizon", 90, 270, 90, 180, 90},
		{"azimuths wrap around north", 30, 350, 30, 10, 9.96185}, // acos(cos^2 30 + sin^2 30 cos 20) [computed]
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := Incidence(tc.zen, tc.az, tc.tilt, tc.surfA); math.Abs(got-tc.want) > 1e-4 {
				t.Errorf("Incidence(%v, %v, %v, %v) = %.6f, want %.6f", tc.zen, tc.az, tc.tilt, tc.surfA, got, tc.want)
			}
		})
	}
	if got := Incidence(math.NaN(), 180, 30, 180); !math.IsNaN(got) {
		t.Errorf("NaN zenith gave %v, want NaN", got)
	}
}

// noaaInverseSquareDistance is (r0/r)^2 from the Earth's radius vector of the
// NOAA series behind Position: R = 1.000001018 (1 - e^2) / (1 + e cos nu),
// nu = M + C (the spreadsheet's "Sun Rad Vector" column; [memory]). It is an
// independent route to what Eccentricity computes with Spencer's series.
func noaaInverseSquareDistance(t time.Time) float64 {
	jd := float64(t.UnixNano())/86400e9 + 2440587.5
	jc := (jd - 2451545) / 36525
	m := 357.52911 + jc*(35999.05029-0.0001537*jc)
	e := 0.016708634 - jc*(0.000042037+0.0000001267*jc)
	c := math.Sin(m*deg)*(1.914602-jc*(0.004817+0.000014*jc)) +
		math.Sin(2*m*deg)*(0.019993-0.000101*jc) + math.Sin(3*m*deg)*0.000289
	r := 1.000001018 * (1 - e*e) / (1 + e*math.Cos((m+c)*deg))
	return 1 / (r * r)
}

// TestEccentricityAgainstOrbit holds Spencer's series (coefficients
// [memory]) to the orbit of the NOAA series over four years, day by day:
// a short script found the two within 0.00094 [computed]; allow 0.0015. At
// perihelion (early January) and aphelion (early July) the factor is about
// (1 -+ 0.0167)^-2 = 1.034 and 0.967 [computed from the orbit's
// eccentricity].
func TestEccentricityAgainstOrbit(t *testing.T) {
	worst := 0.0
	for d := range 4 * 366 {
		at := time.Date(2020, 1, 1, 12, 0, 0, 0, time.UTC).AddDate(0, 0, d)
		worst = math.Max(worst, math.Abs(Eccentricity(at)-noaaInverseSquareDistance(at)))
	}
	if worst > 0.0015 {
		t.Errorf("Spencer and the NOAA orbit differ by up to %.5f, want 0.0015 or less", worst)
	}
	if e := Eccentricity(time.Date(2021, 1, 3, 0, 0, 0, 0, time.UTC)); math.Abs(e-1.034) > 0.002 {
		t.Errorf("eccentricity near perihelion = %.4f, want 1.034 within 0.002", e)
	}
	if e := Eccentricity(time.Date(2021, 7, 4, 0, 0, 0, 0, time.UTC)); math.Abs(e-0.967) > 0.002 {
		t.Errorf("eccentricity near aphelion = %.4f, want 0.967 within 0.002", e)
	}
}

// TestExtraterrestrial checks SolarConstant * Eccentricity * cos z at the
// start of a year, where Spencer's day angle is 0 and the factor is
// 1.000110 + 0.034221 + 0.000719 = 1.035050 [computed by hand from the
// series].
func TestExtraterrestrial(t *testing.T) {
	newYear := time.Date(2021, 1, 1, 0, 0, 0, 0, time.UTC)
	tests := []struct {
		name   string
		zenith float64
		want   float64
	}{
		{"overhead", 0, 1408.70305},   // 1361 * 1.035050
		{"zenith 60", 60, 704.351525}, // half of it
		{"horizon", 90, 0},
		{"below horizon", 120, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := Extraterrestrial(newYear, tc.zenith); math.Abs(got-tc.want) > 1e-4 {
				t.Errorf("Extraterrestrial(new year, %v) = %.6f, want %.6f", tc.zenith, got, tc.want)
			}
		})
	}
	if got := Extraterrestrial(newYear, math.NaN()); !math.IsNaN(got) {
		t.Errorf("NaN zenith gave %v, want NaN", got)
	}
}

// TestClearSkyIndex checks the ratio against the Haurwitz values of
// TestHaurwitz [computed] and the low-sun guard (ClearSkyMaxZenith, 85).
func TestClearSkyIndex(t *testing.T) {
	tests := []struct {
		name        string
		ghi, zenith float64
		want        float64 // NaN: undefined
	}{
		{"clear at zenith 30", 888.2713, 30, 1},
		{"half at zenith 60", 487.8941 / 2, 60, 0.5},
		{"at the threshold", 48.6299, 85, 1},
		{"sun too low", 40, 85.5, math.NaN()},
		{"night", 0, 110, math.NaN()},
		{"missing ghi", math.NaN(), 30, math.NaN()},
		{"missing zenith", 500, math.NaN(), math.NaN()},
		{"cloud enhancement passes through", 1.2 * 888.2713, 30, 1.2},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := ClearSkyIndex(tc.ghi, tc.zenith)
			if math.IsNaN(tc.want) {
				if !math.IsNaN(got) {
					t.Errorf("ClearSkyIndex(%v, %v) = %v, want NaN", tc.ghi, tc.zenith, got)
				}
				return
			}
			if math.Abs(got-tc.want) > 1e-5 {
				t.Errorf("ClearSkyIndex(%v, %v) = %.6f, want %.6f", tc.ghi, tc.zenith, got, tc.want)
			}
		})
	}
}

// TestDiffuseFraction checks the three branches of the Erbs correlation at
// points recomputed by hand from the formula (coefficients [memory]) and
// that the published pieces nearly join at their breakpoints, a check on the
// recalled coefficients: at 0.22 the pieces give 0.98020 and 0.97993, at
// 0.80 they give 0.16527 and 0.165 [computed].
func TestDiffuseFraction(t *testing.T) {
	tests := []struct {
		name string
		kt   float64
		want float64
	}{
		{"overcast branch", 0.1, 0.991},
		{"first breakpoint", 0.22, 0.9802},
		{"polynomial branch", 0.5, 0.65915},
		{"second breakpoint", 0.8, 0.1652696},
		{"clear branch", 0.9, 0.165},
		{"negative index taken as 0", -0.3, 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := DiffuseFraction(tc.kt); math.Abs(got-tc.want) > 1e-6 {
				t.Errorf("DiffuseFraction(%v) = %.7f, want %.7f", tc.kt, got, tc.want)
			}
		})
	}
	for _, b := range []float64{0.22, 0.80} {
		if jump := math.Abs(DiffuseFraction(b) - DiffuseFraction(math.Nextafter(b, 1))); jump > 1e-3 {
			t.Errorf("the correlation jumps by %.5f at kt = %v, want under 1e-3", jump, b)
		}
	}
	if !math.IsNaN(DiffuseFraction(math.NaN())) {
		t.Error("NaN clearness index did not give NaN")
	}
}

// TestErbs checks the split at 2021-06-21 12:00 UTC, where Spencer's factor
// is 0.967381 and the extraterrestrial normal irradiance 1316.6058 W/m2;
// expected values recomputed by a short script from the Erbs formula
// [computed]. Every case must close: dni cos z + dhi = ghi.
func TestErbs(t *testing.T) {
	at := time.Date(2021, 6, 21, 12, 0, 0, 0, time.UTC)
	tests := []struct {
		name             string
		ghi, zenith      float64
		wantDNI, wantDHI float64
	}{
		{"clear-ish, polynomial branch", 800, 30, 700.69119, 193.18363}, // kt 0.7016
		{"overcast, linear branch", 100, 60, 2.73430, 98.63285},         // kt 0.1519
		{"clear, constant branch", 1000, 20, 888.58844, 165},            // kt 0.8083
		{"broken cloud", 300, 45, 29.12789, 279.40347},                  // kt 0.3222
		{"very low sun is all diffuse", 20, 88, 0, 20},
		{"night is all diffuse", 3, 95, 0, 3},
		{"no light", 0, 40, 0, 0},
		{"negative reading taken as 0", -2, 40, 0, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			dni, dhi := Erbs(at, tc.ghi, tc.zenith)
			if math.Abs(dni-tc.wantDNI) > 1e-4 || math.Abs(dhi-tc.wantDHI) > 1e-4 {
				t.Errorf("Erbs(%v, %v) = %.5f, %.5f; want %.5f, %.5f", tc.ghi, tc.zenith, dni, dhi, tc.wantDNI, tc.wantDHI)
			}
			if closure := dni*math.Cos(tc.zenith*deg) + dhi - math.Max(tc.ghi, 0); tc.zenith < 90 && math.Abs(closure) > 1e-9 {
				t.Errorf("dni cos z + dhi - ghi = %g, want 0", closure)
			}
		})
	}
	if dni, dhi := Erbs(at, math.NaN(), 30); !math.IsNaN(dni) || !math.IsNaN(dhi) {
		t.Errorf("NaN ghi gave %v, %v; want NaN, NaN", dni, dhi)
	}
}

// TestErbsCapsBeam feeds a cloud-enhancement reading far above the clear
// sky: the beam may not exceed the extraterrestrial normal irradiance, and
// the split still closes.
func TestErbsCapsBeam(t *testing.T) {
	at := time.Date(2021, 6, 21, 12, 0, 0, 0, time.UTC)
	const ghi, zen = 600.0, 70.0 // kt = 600 / (1316.6 cos 70) = 1.33
	dni, dhi := Erbs(at, ghi, zen)
	g0n := SolarConstant * Eccentricity(at)
	if dni > g0n+1e-9 {
		t.Errorf("dni = %.3f above the extraterrestrial %.3f", dni, g0n)
	}
	if closure := dni*math.Cos(zen*deg) + dhi - ghi; math.Abs(closure) > 1e-9 {
		t.Errorf("dni cos z + dhi - ghi = %g, want 0", closure)
	}
}

// TestPOA checks the isotropic transposition against values recomputed by
// hand from the formula [computed].
func TestPOA(t *testing.T) {
	tests := []struct {
		name                                  string
		ghi, dni, dhi, zen, inc, tilt, albedo float64
		want                                  float64
	}{
		// 700 cos 25.187 + 150 (1 + cos 30)/2 + 600 0.2 (1 - cos 30)/2
		{"tilted 30", 600, 700, 150, 50, 25.187, 30, 0.2, 781.43693},
		{"NaN albedo means the default 0.2", 600, 700, 150, 50, 25.187, 30, math.NaN(), 781.43693},
		// horizontal: 700 cos 50 + 150, whatever the albedo
		{"horizontal", 600, 700, 150, 50, 50, 0, 0.5, 599.95133},
		// vertical, beam from behind: 150/2 + 600 0.3/2
		{"vertical, sun behind", 600, 700, 150, 50, 120, 90, 0.3, 165},
		// sun below the horizon: no beam even if a beam value is given
		{"sun down", 10, 50, 10, 92, 30, 30, 0.2, 9.46410}, // 10 (1+cos30)/2 + 10 0.2 (1-cos30)/2
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := POA(tc.ghi, tc.dni, tc.dhi, tc.zen, tc.inc, tc.tilt, tc.albedo)
			if math.Abs(got-tc.want) > 1e-4 {
				t.Errorf("POA = %.5f, want %.5f", got, tc.want)
			}
		})
	}
}

// TestPOAHorizontalClosure: with a closed Erbs split, a horizontal plane
// receives the global irradiance itself.
func TestPOAHorizontalClosure(t *testing.T) {
	at := time.Date(2022, 3, 20, 11, 0, 0, 0, time.UTC)
	for _, ghi := range []float64{5, 120, 480, 910} {
		for _, zen := range []float64{10, 45, 80, 86.9} {
			dni, dhi := Erbs(at, ghi, zen)
			if got := POA(ghi, dni, dhi, zen, Incidence(zen, 135, 0, 180), 0, 0.2); math.Abs(got-ghi) > 1e-9 {
				t.Errorf("ghi %v, zenith %v: horizontal POA = %.9f", ghi, zen, got)
			}
		}
	}
}
