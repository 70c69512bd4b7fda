// Package wind holds the physical layer of wind power forecasts (METHODS.md
// section 2): the vertical extrapolation of wind speed to hub height, air
// density and the density normalisation of speed, and a power curve learned
// online from meter readings.
//
// Speeds are in m/s, heights in m, pressure in hPa, temperature in C,
// density in kg/m3, power per unit of capacity. Missing inputs are NaN: the
// corrections (HubSpeed, NormalizeSpeed) then return the speed uncorrected
// rather than invent a value, and the estimators (ShearExponent,
// AirDensity) return NaN. Nothing here reads the wall clock.
package wind

import "math"

const (
	// GasConstantDry is the specific gas constant of dry air, J/(kg K)
	// (METHODS.md section 2 [memory]).
	GasConstantDry = 287.05
	// RefDensity is the reference air density of the IEC 61400-12-1 speed
	// normalisation, kg/m3 (METHODS.md section 2 [memory]).
	RefDensity = 1.225
	// DefaultShear is the one-seventh power-law exponent customary over open
	// flat terrain in neutral air ([memory], common practice), for callers
	// who have a single measurement height and no better estimate.
	DefaultShear = 1.0 / 7
)

// ShearExponent returns the power-law exponent a = ln(v2/v1) / ln(h2/h1)
// from speeds v1, v2 measured at heights h1, h2 (METHODS.md section 2). It
// returns NaN when an input is NaN or infinite, a speed or height is not
// positive, or the heights are equal: no exponent can be inferred then.
func ShearExponent(v1, h1, v2, h2 float64) float64 {
	if !(positive(v1) && positive(h1) && positive(v2) && positive(h2)) || h1 == h2 {
		return math.NaN()
	}
	return math.Log(v2/v1) / math.Log(h2/h1)
}

// HubSpeed extrapolates speed v measured at height h to height hub by the
// power law v (hub/h)^alpha (METHODS.md section 2). When h, hub or alpha is
// missing (NaN) or invalid (heights not positive and finite, alpha infinite)
// it returns v unchanged; pass DefaultShear for alpha to extrapolate without
// a measured exponent. A NaN v gives NaN.
func HubSpeed(v, h, hub, alpha float64) float64 {
	if !positive(h) || !positive(hub) || math.IsNaN(alpha) || math.IsInf(alpha, 0) {
		return v
	}
	return v * math.Pow(hub/h, alpha)
}

// AirDensity returns the density of dry air rho = p / (R_d T), kg/m3, with
// p in Pa from pressureHPa and T in K from tempC (R_d = GasConstantDry;
// METHODS.md section 2). It returns NaN when an input is NaN, the pressure is
// not positive or the temperature is at or below absolute zero.
func AirDensity(pressureHPa, tempC float64) float64 {
	kelvin := tempC + 273.15
	if !positive(pressureHPa) || !positive(kelvin) {
		return math.NaN()
	}
	return pressureHPa * 100 / (GasConstantDry * kelvin)
}

// NormalizeSpeed returns the speed normalised to the reference density,
// v (rho / RefDensity)^(1/3), as IEC 61400-12-1 does for pitch-regulated
// turbines (METHODS.md section 2). When rho is missing (NaN) or not a
// positive finite number it returns v unchanged.
func NormalizeSpeed(v, rho float64) float64 {
	if !positive(rho) {
		return v
	}
	return v * math.Cbrt(rho/RefDensity)
}

// positive reports whether x is a positive finite number (false for NaN).
func positive(x float64) bool { return x > 0 && !math.IsInf(x, 1) }
