// Package synth generates an invented demo fleet: six wind and solar sites on
// an imaginary island group in the open North Atlantic (around 44 N, 30 W,
// where there is no land), with weather runs and meter readings made up by a
// small, seeded physical simulation. `plumb demo` runs on it, and
// testdata/demo holds its default output for the walk-through.
//
// Nothing here describes a real place, plant or weather record.
//
// # The fleet
//
//	pv-heron-flats      PV    40 MW
//	pv-saltcombe        PV    25 MW
//	pv-brindle          PV    12 MW
//	wind-gorse-hill     wind  60 MW  hub 90 m
//	wind-tallow-ridge   wind  45 MW  hub 100 m
//	wind-ketch-bank     wind  30 MW  hub 80 m
//
// # The simulated truth (one-minute steps)
//
//   - Sun: position by the NOAA solar calculator series (Meeus), clear-sky
//     global horizontal irradiance by Haurwitz: 1098 cos z exp(-0.059/cos z)
//     (METHODS.md section 1).
//   - Clouds: a clear-sky index k (GHI = k x clear-sky GHI) drawn from weather
//     regimes lasting 1.5 to 4.5 days (clear, broken, overcast: mean k 0.93,
//     0.62, 0.30), blended over about six hours, plus AR(1) fluctuations with
//     a part common to the three PV sites (time constant 90 min) and a local
//     part (20 min). Cloud fraction follows from k by inverting Kasten and
//     Czeplak's k = 1 - 0.75 c^3.4 (recalled from memory).
//   - Temperature: about 13.5 C at sea level (March over this ocean), a
//     diurnal cycle larger under clear skies, a synoptic part with a
//     correlation time of about 1.5 days, -6.5 C/km with elevation.
//   - PV output: capacity x GHI/1000 x 0.86 x (1 - 0.0035 (T_cell - 25)),
//     T_cell = T_air + GHI x 25/800, at most capacity. The plants are modelled
//     as seeing GHI (no plane-of-array transposition), so the sites carry no
//     tilt or azimuth.
//   - Wind at hub height: a Gaussian index with a synoptic part common to
//     the three wind sites (correlation time about 30 h, weight 0.93) and a
//     local part (about 3 h), mapped to a Weibull distribution (shape 2.1,
//     site scale 7.9 to 8.9 m/s), times a weak diurnal cycle. These slow
//     processes are smooth at short time scales (an AR(1) series passed
//     through an exponential filter): in the default demo hourly ramps are
//     about 9 % of capacity (RMS), near the 8 to 10 % of the gefcom2012-wind
//     farms. Direction and pressure follow the synoptic part (low pressure
//     when windy).
//   - Wind output: a turbine curve with cut-in 3 m/s, rated 12 m/s (cubic in
//     between), cut-out 25 m/s, smoothed over the farm by averaging over
//     speeds +-8 % (three-point Gauss-Hermite).
//
// # Meter readings
//
// The mean power over each StepMinutes interval, plus Gaussian noise of
// 0.4 % of capacity when the plant produces, clipped to [0, capacity] and
// rounded to 1 kW. A PV reading is exactly zero when the sun stays below the
// horizon over the whole interval. Availability is 1 throughout.
//
// # Weather runs
//
// A run is issued every 6 h at 00, 06, 12 and 18 UTC and released at its
// issue time; it covers the next 48 h in hourly valid intervals (lead, from
// issue time to valid start, 0 to 47 h). PV sites get ghi_wm2, temp_c and
// cloud_frac; wind sites get wind_ms, wind_dir_deg, temp_c and pressure_hpa.
// A forecast is the hourly mean of the truth plus an error that is
// correlated along the run (time constant 8 h) and between sites (70 %
// common), unbiased, with a spread growing linearly with lead: clear-sky
// index 0.05 to 0.22, wind speed 0.6 to 2.5 m/s, direction 6 to 26 deg,
// temperature 0.4 to 1.6 C, pressure 0.4 to 3 hPa (from lead 0 to 48 h).
// Irradiance forecasts know the sun exactly: they are zero at night.
//
// # The fault
//
// From FaultFrom on (by default half way), the output of FaultSite (by
// default pv-heron-flats) is multiplied by FaultFactor (by default 2/3: it
// loses a third, as after heavy soiling or a lost inverter block). The
// weather is unaffected and the availability still reads 1: nothing in the
// inputs announces the fault, which a forecaster sees only in the meter
// readings. It is what the demo's coverage alarms are meant to catch.
//
// # Determinism
//
// The same options give the same fleet, bit for bit: every random draw comes
// from a PCG generator (math/rand/v2) seeded from Seed and the name of the
// process it feeds, and the output is built in a fixed order.
package synth
