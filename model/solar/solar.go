// Package solar holds solar geometry, clear-sky and extraterrestrial
// irradiance, the split of global irradiance into beam and diffuse parts, the
// transposition to a tilted plane and the module temperature derate: the
// physical layer of PV forecasts (METHODS.md section 1). Times are UTC,
// angles in degrees (azimuths east of north), irradiance in W/m2. Nothing
// here allocates or reads the wall clock.
package solar

import (
	"math"
	"time"
)

const deg = math.Pi / 180

// Position returns the sun's zenith and azimuth (east of north) in degrees
// seen from lat, lon (degrees, north and east positive) at time t, without
// atmospheric refraction.
//
// It follows the NOAA solar calculator (the "General Solar Position" series
// of the NOAA Global Monitoring Laboratory spreadsheet, itself from Meeus,
// "Astronomical Algorithms"): Julian century, the sun's mean longitude and
// anomaly, equation of centre, apparent longitude, corrected obliquity,
// declination and equation of time. Universal time stands in for terrestrial
// time (about a minute apart today, a 0.01 degree effect at most). The test
// holds it to the worked example of the Solar Position Algorithm (METHODS.md
// section 1, Reda and Andreas 2004) within 0.05 degrees.
func Position(t time.Time, lat, lon float64) (zenith, azimuth float64) {
	decl, eot := Declination(t)
	t = t.UTC()
	dayMinutes := float64(t.Hour()*60+t.Minute()) + (float64(t.Second())+float64(t.Nanosecond())/1e9)/60
	trueSolar := math.Mod(dayMinutes+eot+4*lon, 1440)
	if trueSolar < 0 {
		trueSolar += 1440
	}
	hourAngle := trueSolar/4 - 180
	cosZ := math.Sin(lat*deg)*math.Sin(decl*deg) + math.Cos(lat*deg)*math.Cos(decl*deg)*math.Cos(hourAngle*deg)
	cosZ = math.Max(-1, math.Min(1, cosZ))
	zenith = math.Acos(cosZ) / deg
	sinZ := math.Sin(zenith * deg)
	if sinZ < 1e-12 {
		return zenith, 180
	}
	c := (math.Sin(lat*deg)*cosZ - math.Sin(decl*deg)) / (math.Cos(lat*deg) * sinZ)
	a := math.Acos(math.Max(-1, math.Min(1, c))) / deg
	if hourAngle > 0 {
		azimuth = math.Mod(a+180, 360)
	} else {
		azimuth = math.Mod(540-a, 360)
	}
	return zenith, azimuth
}

// Declination returns the sun's apparent declination (degrees) and the
// equation of time (minutes) at t, by the NOAA series (see Position).
func Declination(t time.Time) (decl, eot float64) {
	jd := float64(t.UnixNano())/86400e9 + 2440587.5
	jc := (jd - 2451545) / 36525
	l0 := math.Mod(280.46646+jc*(36000.76983+jc*0.0003032), 360)
	m := 357.52911 + jc*(35999.05029-0.0001537*jc)
	e := 0.016708634 - jc*(0.000042037+0.0000001267*jc)
	center := math.Sin(m*deg)*(1.914602-jc*(0.004817+0.000014*jc)) +
		math.Sin(2*m*deg)*(0.019993-0.000101*jc) + math.Sin(3*m*deg)*0.000289
	omega := 125.04 - 1934.136*jc
	appLong := l0 + center - 0.00569 - 0.00478*math.Sin(omega*deg)
	eps0 := 23 + (26+(21.448-jc*(46.815+jc*(0.00059-jc*0.001813)))/60)/60
	eps := eps0 + 0.00256*math.Cos(omega*deg)
	decl = math.Asin(math.Sin(eps*deg)*math.Sin(appLong*deg)) / deg
	y := math.Pow(math.Tan(eps*deg/2), 2)
	eot = 4 / deg * (y*math.Sin(2*l0*deg) - 2*e*math.Sin(m*deg) + 4*e*y*math.Sin(m*deg)*math.Cos(2*l0*deg) -
		0.5*y*y*math.Sin(4*l0*deg) - 1.25*e*e*math.Sin(2*m*deg))
	return decl, eot
}

// Refraction returns the atmospheric refraction (degrees) lifting the sun at
// true elevation elev (degrees), scaled for pressure (hPa) and temperature
// (C) as in the Solar Position Algorithm (Reda and Andreas 2004, eq. 42).
func Refraction(elev, pressureHPa, tempC float64) float64 {
	if elev < -0.83337 { // the sun is below the horizon even with refraction
		return 0
	}
	return pressureHPa / 1010 * 283 / (273 + tempC) * 1.02 / (60 * math.Tan((elev+10.3/(elev+5.11))*deg))
}

// Haurwitz returns the clear-sky global horizontal irradiance (W/m2) for a
// solar zenith angle in degrees: 1098 cos z exp(-0.059 / cos z) for
// z < 90, else 0 (Haurwitz 1945, METHODS.md section 1).
func Haurwitz(zenith float64) float64 {
	if zenith >= 90 {
		return 0
	}
	c := math.Cos(zenith * deg)
	return 1098 * c * math.Exp(-0.059/c)
}
