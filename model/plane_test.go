package model

import (
	"math"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model/solar"
)

// TestStackPlaneOfArray: for an invented PV site on an east-facing plane
// steeply tilted (60 degrees, facing 90 degrees east of north, at 50 N),
// whose output follows the irradiance on its plane, the Stack that knows
// the tilt and azimuth (the physical layer then works on the plane of
// array: clear-sky potential and forecast irradiance on the plane,
// temperature derate) forecasts better than the same Stack told only the
// location. Both learn online from the same hourly history (90 days; the
// last 30 scored, 6 h ahead, levels 0.1 to 0.9).
func TestStackPlaneOfArray(t *testing.T) {
	lat, lon, tilt, az := 50.0, 8.0, 60.0, 90.0
	plane := Site{ID: "ridge-east", Kind: KindPV, CapacityMW: 10, Lat: &lat, Lon: &lon, TiltDeg: &tilt, AzimuthDeg: &az}
	flat := plane
	flat.TiltDeg, flat.AzimuthDeg = nil, nil
	start := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	const days, scored, lead = 90, 30, 6
	// The true irradiance and temperature of each hour, and the daily
	// runs (issued at 00 UTC, 48 hourly rows) forecasting them with error.
	ghi := func(h int) float64 {
		mid := start.Add(time.Duration(h)*time.Hour + 30*time.Minute)
		z, _ := solar.Position(mid, lat, lon)
		if z >= 90 {
			return 0
		}
		cloud := 0.55 + 0.45*math.Sin(float64(h)/17.3)*math.Cos(float64(h)/41.7)
		return 1000 * solar.Haurwitz(z) / 1000 * cloud
	}
	temp := func(h int) float64 { return 12 + 8*math.Sin(float64(h%24-9)*math.Pi/12) }
	var runs []*WeatherRun
	for d := 0; d <= days; d++ {
		r := &WeatherRun{Site: plane.ID, IssuedAt: start.Add(time.Duration(24*d) * time.Hour), Vars: []string{"ghi_wm2", "temp_c"}}
		for k := range 48 {
			h := 24*d + k
			e := 1 + 0.1*stateNoise(uint64(h), 7)
			r.Rows = append(r.Rows, WeatherRow{ValidStart: r.IssuedAt.Add(time.Duration(k) * time.Hour), ValidMinutes: 60,
				Values: []float64{ghi(h) * e, temp(h) + stateNoise(uint64(h), 8)}})
		}
		runs = append(runs, r)
	}
	power := func(h int) float64 {
		mid := start.Add(time.Duration(h)*time.Hour + 30*time.Minute)
		p := plane.CapacityMW * solar.PVPotential(mid, lat, lon, ghi(h), temp(h), math.NaN(), tilt, az) * (1 + 0.03*stateNoise(uint64(h), 9))
		return math.Max(0, math.Min(plane.CapacityMW, p))
	}
	r := hourlyReplay{start: start, days: days, scored: scored, lead: lead, runs: runs, power: power,
		driver: func(row *WeatherRow) float64 { return row.Values[0] },
		night:  func(mid time.Time) bool { z, _ := solar.Position(mid, lat, lon); return z >= 90 }}
	withPlane, withoutPlane := r.loss(t, plane), r.loss(t, flat)
	t.Logf("mean pinball per MW of capacity: told the plane %.4f, told the location only %.4f", withPlane/plane.CapacityMW, withoutPlane/plane.CapacityMW)
	if !(withPlane < 0.9*withoutPlane) {
		t.Errorf("knowing the plane does not help: %.4f against %.4f without", withPlane, withoutPlane)
	}
}
