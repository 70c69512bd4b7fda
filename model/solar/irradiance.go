package solar

import (
	"math"
	"time"
)

// SolarConstant is the total solar irradiance at one astronomical unit,
// W/m2 (about 1361, the value adopted since the 2011 revision of the
// space-borne record; [memory]).
const SolarConstant = 1361.0

// ClearSkyMaxZenith is the largest solar zenith angle (degrees) at which
// ClearSkyIndex is defined. Below 5 degrees of elevation the clear-sky
// irradiance is under 50 W/m2 (Haurwitz gives 48.6 at 85 degrees), and
// timing errors of a few minutes, refraction and the clear-sky model's own
// error dominate the ratio; cutting at 85 degrees is common practice.
const ClearSkyMaxZenith = 85.0

// DefaultAlbedo is the ground reflectance POA uses when it is not known:
// 0.2, the customary value for grass and bare soil (common practice,
// [memory]).
const DefaultAlbedo = 0.2

// erbsMaxZenith is the zenith angle (degrees) beyond which Erbs puts all of
// the irradiance into the diffuse part: 1/cos z grows without bound near the
// horizon, and a direct beam derived from a few W/m2 of GHI is noise.
const erbsMaxZenith = 87.0

// erbsMinCos bounds cos z from below when the clearness index is formed, so
// that twilight readings do not give absurd indices (cos 86.27 deg).
const erbsMinCos = 0.065

// Eccentricity returns the eccentricity correction factor (r0/r)^2 of the
// Earth's orbit at t: the ratio of the extraterrestrial irradiance at t to
// its value at the mean Sun-Earth distance. It uses Spencer's Fourier series
// (Spencer 1971, as given by Iqbal 1983; coefficients [memory]) with the
// day angle 2 pi (d - 1) / 365, d the UTC day of the year counted with its
// fraction. It stays within 0.1 % of the inverse square radius vector of
// the NOAA series behind Position (checked in the tests).
func Eccentricity(t time.Time) float64 {
	t = t.UTC()
	day := float64(t.YearDay()-1) + (float64(t.Hour())+float64(t.Minute())/60+float64(t.Second())/3600)/24
	g := 2 * math.Pi * day / 365
	return 1.000110 + 0.034221*math.Cos(g) + 0.001280*math.Sin(g) +
		0.000719*math.Cos(2*g) + 0.000077*math.Sin(2*g)
}

// Extraterrestrial returns the irradiance (W/m2) that a horizontal surface
// at the top of the atmosphere receives at t with the sun at the given
// zenith angle (degrees): SolarConstant * Eccentricity(t) * cos z for
// z < 90, else 0. A NaN zenith gives NaN.
func Extraterrestrial(t time.Time, zenith float64) float64 {
	if math.IsNaN(zenith) {
		return math.NaN()
	}
	if zenith >= 90 {
		return 0
	}
	return SolarConstant * Eccentricity(t) * math.Cos(zenith*deg)
}

// ClearSkyIndex returns ghi / Haurwitz(zenith), the clear-sky index k
// (METHODS.md section 1), or NaN when the zenith angle exceeds
// ClearSkyMaxZenith or an input is NaN. The ratio is not clipped: a slightly
// negative night-time reading or a cloud-enhancement peak above 1 is passed
// through for the caller to judge.
func ClearSkyIndex(ghi, zenith float64) float64 {
	if math.IsNaN(ghi) || math.IsNaN(zenith) || zenith > ClearSkyMaxZenith {
		return math.NaN()
	}
	return ghi / Haurwitz(zenith)
}

// DiffuseFraction returns the diffuse share of global horizontal irradiance
// for a clearness index kt by the Erbs, Klein and Duffie (Solar Energy
// 28(4), 1982) correlation: 1 - 0.09 kt for kt <= 0.22; 0.9511 - 0.1604 kt
// + 4.388 kt^2 - 16.638 kt^3 + 12.336 kt^4 up to kt = 0.80; 0.165 above
// (coefficients [memory]). Negative kt is taken as 0; NaN gives NaN.
func DiffuseFraction(kt float64) float64 {
	switch {
	case math.IsNaN(kt):
		return math.NaN()
	case kt <= 0.22:
		return 1 - 0.09*math.Max(kt, 0)
	case kt <= 0.80:
		return 0.9511 + kt*(-0.1604+kt*(4.388+kt*(-16.638+kt*12.336)))
	default:
		return 0.165
	}
}

// Erbs splits global horizontal irradiance ghi (W/m2) measured at t with the
// sun at zenith (degrees) into direct normal (dni) and diffuse horizontal
// (dhi) irradiance by the Erbs correlation (see DiffuseFraction), with the
// clearness index kt = ghi / (SolarConstant * Eccentricity(t) * cos z).
//
// The split always closes: dni cos z + dhi = max(ghi, 0). With no light, or
// the sun lower than 3 degrees of elevation (zenith 87 or more, horizon and
// below included), all of it is diffuse (dni = 0). cos z is held at 0.065 or more when forming kt,
// and dni is capped at the extraterrestrial normal irradiance (the excess,
// which only cloud enhancement can produce, goes to dhi). NaN inputs give
// NaN, NaN.
func Erbs(t time.Time, ghi, zenith float64) (dni, dhi float64) {
	if math.IsNaN(ghi) || math.IsNaN(zenith) {
		return math.NaN(), math.NaN()
	}
	ghi = math.Max(ghi, 0)
	if ghi == 0 || zenith >= erbsMaxZenith {
		return 0, ghi
	}
	cosZ := math.Cos(zenith * deg)
	g0n := SolarConstant * Eccentricity(t)
	kt := ghi / (g0n * math.Max(cosZ, erbsMinCos))
	dhi = DiffuseFraction(kt) * ghi
	dni = (ghi - dhi) / cosZ
	if dni > g0n {
		dni = g0n
		dhi = ghi - dni*cosZ
	}
	return dni, dhi
}

// Incidence returns the angle of incidence (degrees, in [0, 180]) of the
// direct beam on a plane tilted by tilt degrees from the horizontal whose
// normal points towards surfaceAzimuth, with the sun at zenith and azimuth;
// both azimuths are in degrees east of north (a south-facing plane has
// surfaceAzimuth 180). cos theta = cos z cos tilt + sin z sin tilt
// cos(azimuth - surfaceAzimuth), eq. 47 of the Solar Position Algorithm
// (Reda and Andreas 2004), whose surface azimuth rotation gamma (from south,
// positive towards the west) is surfaceAzimuth - 180 here, and whose
// astronomers' azimuth (from south, westward) is azimuth - 180: the two 180s
// cancel. NaN inputs give NaN. Above 90 degrees the beam strikes the back
// of the plane.
func Incidence(zenith, azimuth, tilt, surfaceAzimuth float64) float64 {
	sz, cz := math.Sincos(zenith * deg)
	st, ct := math.Sincos(tilt * deg)
	c := cz*ct + sz*st*math.Cos((azimuth-surfaceAzimuth)*deg)
	return math.Acos(math.Max(-1, math.Min(1, c))) / deg
}

// POA returns the plane-of-array irradiance (W/m2) on a plane tilted by tilt
// degrees, from the global (ghi), direct normal (dni) and diffuse (dhi)
// irradiance, the solar zenith angle and the angle of incidence on the plane
// (degrees, see Incidence), by the isotropic sky model:
//
//	dni max(cos incidence, 0) + dhi (1 + cos tilt)/2 + ghi albedo (1 - cos tilt)/2
//
// The beam term is zero with the sun at or below the horizon. A NaN albedo
// means DefaultAlbedo; other NaN inputs give NaN. A horizontal plane with a
// closed split (dni cos z + dhi = ghi) receives exactly ghi.
func POA(ghi, dni, dhi, zenith, incidence, tilt, albedo float64) float64 {
	if math.IsNaN(albedo) {
		albedo = DefaultAlbedo
	}
	if math.IsNaN(zenith) || math.IsNaN(incidence) {
		return math.NaN()
	}
	beam := 0.0
	if zenith < 90 && incidence < 90 {
		beam = dni * math.Cos(incidence*deg)
	} else if math.IsNaN(dni) {
		beam = math.NaN()
	}
	ct := math.Cos(tilt * deg)
	return beam + dhi*(1+ct)/2 + ghi*albedo*(1-ct)/2
}
