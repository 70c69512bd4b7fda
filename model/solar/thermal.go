package solar

import "math"

// Thermal holds a PV module's cell-temperature model and its power
// temperature coefficient. The cell temperature follows Faiman (Progress in
// Photovoltaics 16, 2008): Tc = Ta + E / (U0 + U1 w), with E the
// plane-of-array irradiance (W/m2), Ta the air temperature and w the wind
// speed (m/s). The zero value holds the defaults; a Thermal is a plain value
// and safe for concurrent use.
type Thermal struct {
	// U0 is the constant heat-loss coefficient, W/(m2 K). Zero means 25
	// ([memory], the usual default for an open-rack module).
	U0 float64
	// U1 is the wind-driven heat-loss coefficient, W s/(m3 K). Zero means
	// 6.84 ([memory], same source as U0).
	U1 float64
	// Gamma is the relative change of DC power per kelvin of cell
	// temperature above 25 C, 1/K. Zero means -0.004 (common practice for
	// crystalline silicon). A module insensitive to temperature is modelled
	// by a tiny value such as -1e-9.
	Gamma float64
	// WindMS is the wind speed (m/s) assumed when the reading is NaN. Zero
	// means 1 m/s, a light breeze: an assumption on the warm (conservative)
	// side, chosen for this project.
	WindMS float64
}

// stcTempC is the cell temperature (C) of standard test conditions, at which
// the rated power holds.
const stcTempC = 25.0

func (th Thermal) withDefaults() Thermal {
	if th.U0 == 0 {
		th.U0 = 25
	}
	if th.U1 == 0 {
		th.U1 = 6.84
	}
	if th.Gamma == 0 {
		th.Gamma = -0.004
	}
	if th.WindMS == 0 {
		th.WindMS = 1
	}
	return th
}

// CellTemp returns the cell temperature (C) for plane-of-array irradiance
// poa (W/m2, negative taken as 0), air temperature tempC (C) and wind speed
// windMS (m/s; NaN means th.WindMS, negative is taken as 0). A NaN poa or
// tempC gives NaN.
func (th Thermal) CellTemp(poa, tempC, windMS float64) float64 {
	th = th.withDefaults()
	if math.IsNaN(windMS) {
		windMS = th.WindMS
	}
	return tempC + math.Max(poa, 0)/(th.U0+th.U1*math.Max(windMS, 0))
}

// Derate returns the factor 1 + Gamma (Tc - 25) by which DC power departs
// from its value at 25 C of cell temperature, Tc from CellTemp, held at 0 or
// more. A NaN tempC or poa gives 1 (no correction): the caller still gets an
// irradiance-driven estimate when the temperature is missing.
func (th Thermal) Derate(poa, tempC, windMS float64) float64 {
	tc := th.CellTemp(poa, tempC, windMS)
	if math.IsNaN(tc) {
		return 1
	}
	return math.Max(0, 1+th.withDefaults().Gamma*(tc-stcTempC))
}
