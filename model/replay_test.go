package model

import (
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model/score"
)

// hourlyReplay is an invented hourly history a Stack learns online, as the
// worker would feed it: at the end of each hour h it forecasts hour h+lead
// from the run issued at the latest 00 UTC (runs[d], 48 hourly rows from
// start + d days), and when an hour settles it learns the outcome. The
// forecasts of the hours of the last scored days, nights left out, are
// scored by mean pinball at levels 0.1 to 0.9.
type hourlyReplay struct {
	start              time.Time
	days, scored, lead int
	runs               []*WeatherRun
	power              func(h int) float64           // outcome of hour h (MW)
	driver             func(row *WeatherRow) float64 // Features.Driver of a row
	night              func(mid time.Time) bool      // nil: never night
}

// loss returns the mean pinball of a Stack for site over the scored days.
func (r hourlyReplay) loss(t *testing.T, site Site) float64 {
	t.Helper()
	levels := LevelGrid(10)
	f := NewStack(site, Setup{Levels: levels}, StackOptions{MinRows: 24 * 10, InstallAfter: 1})
	pending := map[int]*Features{}
	q := make([]float64, len(levels))
	sum, n := 0.0, 0
	for h := 0; h < 24*r.days; h++ {
		// The hour h settles: the forecast of it, made lead hours
		// before, is scored and learned from.
		if x := pending[h]; x != nil {
			y := r.power(h)
			if h >= 24*(r.days-r.scored) && !x.Night {
				f.Quantiles(q, x, levels)
				sum += score.MeanPinball(q, levels, y)
				n++
			}
			f.Learn(y, []*Features{x})
			delete(pending, h)
		}
		// At the end of hour h, forecast hour h+lead.
		target, d := h+r.lead, (h+1)/24
		run := r.runs[d]
		row := &run.Rows[target-24*d]
		vs := r.start.Add(time.Duration(target) * time.Hour)
		pending[target] = &Features{
			ValidStart: vs, ValidMinutes: 60, LeadMinutes: 60 * r.lead, Bucket: DefaultBuckets().Of(60 * r.lead),
			CapacityMW: site.CapacityMW, Availability: 1, Driver: r.driver(row),
			LastPowerMW: r.power(h), HourUTC: float64(vs.Hour()) + 0.5,
			Night:   r.night != nil && r.night(vs.Add(30*time.Minute)),
			Weather: row, WeatherVars: run.Vars,
		}
	}
	if fits, err := f.Fits(); fits == 0 {
		t.Fatalf("%s: no forest grown (%v)", site.ID, err)
	}
	return sum / float64(n)
}
