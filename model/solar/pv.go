package solar

import (
	"math"
	"time"
)

// PVPotential returns a relative output proxy of a PV plane at t: the
// plane-of-array irradiance with the temperature derate of Thermal{}
// (defaults), per 1000 W/m2, so a module at standard test conditions gives 1.
// It is a physical feature for the statistical layer, not a calibrated
// forecast: inverter clipping, losses and shading are left to what that layer
// learns.
//
// Inputs: lat, lon in degrees (north and east positive), ghi the global
// horizontal irradiance (W/m2), tempC the air temperature, windMS the wind
// speed, tilt the plane's slope from horizontal and surfaceAzimuth the
// direction its normal points (degrees east of north). The steps are
// Position with refraction for a standard atmosphere (1010 hPa, 10 C), Erbs,
// Incidence, POA with DefaultAlbedo, then Thermal.Derate.
//
// It degrades gracefully with missing metadata or readings:
//   - NaN ghi gives NaN; negative ghi is taken as 0, and no light gives 0.
//   - Unknown tilt (NaN, or outside [0, 180]) means a horizontal plane. Of the
//     two usual guesses this one is neutral: it assumes nothing about fixed
//     racks versus trackers, and a horizontal plane receives exactly ghi, so
//     the statistical layer sees the irradiance forecast itself.
//   - Known tilt with unknown (NaN or infinite) surfaceAzimuth means a plane facing the
//     equator (180 in the northern hemisphere, 0 in the southern).
//   - Unknown or invalid location (NaN, or lat, lon out of range) also means a
//     horizontal plane, which needs no geometry.
//   - NaN tempC means no temperature derate; NaN windMS means Thermal's
//     default wind (1 m/s).
func PVPotential(t time.Time, lat, lon, ghi, tempC, windMS, tilt, surfaceAzimuth float64) float64 {
	if math.IsNaN(ghi) {
		return math.NaN()
	}
	ghi = math.Max(ghi, 0)
	if ghi == 0 {
		return 0
	}
	poa := ghi
	located := lat >= -90 && lat <= 90 && lon >= -180 && lon <= 180 // false for NaN
	tilted := tilt > 0 && tilt <= 180                               // false for NaN
	if located && tilted {
		if math.IsNaN(surfaceAzimuth) || math.IsInf(surfaceAzimuth, 0) {
			surfaceAzimuth = 180
			if lat < 0 {
				surfaceAzimuth = 0
			}
		}
		zen, az := Position(t, lat, lon)
		zen -= Refraction(90-zen, 1010, 10)
		dni, dhi := Erbs(t, ghi, zen)
		inc := Incidence(zen, az, tilt, surfaceAzimuth)
		poa = POA(ghi, dni, dhi, zen, inc, tilt, DefaultAlbedo)
	}
	return poa * Thermal{}.Derate(poa, tempC, windMS) / 1000
}
