package model

import (
	"math"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model/wind"
)

// TestStackWindSpeedWorked: the speed the Stack's wind layer uses, worked
// by hand for one row: 5 m/s at 10 m and 8 m/s at 100 m give the shear
// exponent ln(1.6)/ln(10) = 0.204120; carried to a 120 m hub, 8 x
// 1.2^0.204120 = 8.303333 m/s; at 1000 hPa and 15 C the air density is
// 100000 / (287.05 x 288.15) = 1.208993 kg/m3 (dry air; the constant as in
// METHODS.md section 2), so the normalised speed is 8.303333 x
// (1.208993/1.225)^(1/3) = 8.267008 m/s (IEC 61400-12-1 normalisation;
// values worked out for this test, not from a publication). Without a hub height only the
// density normalisation applies; without temperature and pressure, the
// driver is used as it is.
func TestStackWindSpeedWorked(t *testing.T) {
	hub := 120.0
	site := Site{ID: "crest-1", Kind: KindWind, CapacityMW: 20, HubHeightM: &hub}
	vars := []string{"pressure_hpa", "temp_c", "u100_ms", "u10_ms", "v100_ms", "v10_ms", "wind_ms"}
	row := &WeatherRow{ValidStart: time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC), ValidMinutes: 60,
		Values: []float64{1000, 15, 8 * 0.6, 5 * 0.8, 8 * 0.8, 5 * 0.6, 5}}
	s := NewStack(site, Setup{}, StackOptions{})
	want := 8 * math.Pow(1.2, math.Log(1.6)/math.Log(10)) * math.Cbrt(100000/(wind.GasConstantDry*288.15)/wind.RefDensity)
	if got := s.windSpeed(row, vars, 5); math.Abs(got-want) > 1e-9 || math.Abs(got-8.267008) > 5e-7 {
		t.Errorf("hub and density: %.6f, want %.6f (8.267008 by hand)", got, want)
	}
	flat := site
	flat.HubHeightM = nil
	s = NewStack(flat, Setup{}, StackOptions{})
	if got, want := s.windSpeed(row, vars, 5), 5*math.Cbrt(100000/(wind.GasConstantDry*288.15)/wind.RefDensity); math.Abs(got-want) > 1e-9 {
		t.Errorf("density only: %.6f, want %.6f", got, want)
	}
	s = NewStack(site, Setup{}, StackOptions{})
	if got := s.windSpeed(row, []string{"wind_ms"}, 5); got != 5 {
		t.Errorf("no heights, no air: %v, want the driver 5", got)
	}
}

// TestStackHubAndDensity: an invented wind farm (hub at 120 m) whose
// output follows the hub-height speed at standard density, under weather
// whose shear and air density swing widely; the runs give speeds at 10 m
// and 100 m, temperature and pressure. The Stack told the hub height
// forecasts at least as well as the same Stack without it on the same
// runs stripped of temperature and pressure (it then sees the 10 m speed
// only through the forest); both learn online from 90 days, the last 30
// scored, 6 h ahead.
func TestStackHubAndDensity(t *testing.T) {
	hub := 120.0
	site := Site{ID: "crest-2", Kind: KindWind, CapacityMW: 20, HubHeightM: &hub}
	bare := site
	bare.HubHeightM = nil
	start := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	const days, scored, lead = 90, 30, 6
	v10 := func(h int) float64 { return 6 + 4*math.Sin(float64(h)/13.1) + 2*math.Sin(float64(h)/3.7) }
	alpha := func(h int) float64 { return 0.2 + 0.15*math.Sin(float64(h)/29.3) }
	temp := func(h int) float64 { return 12 + 20*math.Sin(float64(h)/71.9) }
	pres := func(h int) float64 { return 990 + 35*math.Sin(float64(h)/53.3) }
	curve := func(v float64) float64 { return math.Max(0, math.Min(1, (v*v*v-27)/(1331-27))) }
	truthSpeed := func(h int) float64 {
		v := v10(h) * math.Pow(hub/10, alpha(h))
		return wind.NormalizeSpeed(v, wind.AirDensity(pres(h), temp(h)))
	}
	power := func(h int) float64 {
		return site.CapacityMW * math.Max(0, math.Min(1, curve(truthSpeed(h))*(1+0.03*stateNoise(uint64(h), 4))))
	}
	mkRuns := func(full bool) []*WeatherRun {
		var runs []*WeatherRun
		for d := 0; d <= days; d++ {
			r := &WeatherRun{Site: site.ID, IssuedAt: start.Add(time.Duration(24*d) * time.Hour)}
			if full {
				r.Vars = []string{"pressure_hpa", "temp_c", "u100_ms", "u10_ms", "v100_ms", "v10_ms", "wind_ms"}
			} else {
				r.Vars = []string{"u10_ms", "v10_ms", "wind_ms"}
			}
			for k := range 48 {
				h := 24*d + k
				e := 1 + 0.05*stateNoise(uint64(h), 5)
				a, b := v10(h)*e, v10(h)*math.Pow(10, alpha(h))*e
				vals := []float64{pres(h), temp(h), b * 0.6, a * 0.6, b * 0.8, a * 0.8, a}
				if !full {
					vals = []float64{a * 0.6, a * 0.8, a}
				}
				r.Rows = append(r.Rows, WeatherRow{ValidStart: r.IssuedAt.Add(time.Duration(k) * time.Hour), ValidMinutes: 60, Values: vals})
			}
			runs = append(runs, r)
		}
		return runs
	}
	replay := func(runs []*WeatherRun) hourlyReplay {
		return hourlyReplay{start: start, days: days, scored: scored, lead: lead, runs: runs, power: power,
			driver: func(row *WeatherRow) float64 { return row.Values[len(row.Values)-1] }}
	}
	told, untold := replay(mkRuns(true)).loss(t, site), replay(mkRuns(false)).loss(t, bare)
	t.Logf("mean pinball per MW: hub height, temperature and pressure known %.4f; 10 m speed only %.4f", told/site.CapacityMW, untold/site.CapacityMW)
	if !(told < untold) {
		t.Errorf("the hub height and the air do not help: %.4f against %.4f", told, untold)
	}
}
