package worker

import (
	"fmt"
	"math"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
)

// KindMeterFlat: a site's meter has read the same value, strictly between
// no output and full output, for longer than a plant's output stays still
// (a stuck meter or a frozen data feed). It runs on event time, in the
// actor, and is published with the coverage alarms.
const KindMeterFlat = "meter_flat"

// DefaultMeterFlat is the default of Config.MeterFlat. On the open data
// sets the longest run of one value between flatLow and flatHigh of
// capacity lasts 10 h (GEFCom2012 wind farm wf3, 0.919 of capacity from
// 2011-02-18 02:00 UTC, readings rounded to a thousandth of capacity; 2 h
// on GEFCom2014 solar, one 15-minute reading on serf-pv-15min), so 12 h
// raises nothing there.
const DefaultMeterFlat = 12 * time.Hour

// The band of output a flat run is judged in, as shares of capacity: at
// no output (a calm, a night, an outage) and at full output (rated wind,
// a clipped inverter) a plant's output does stand still for hours.
const (
	flatLow  = 0.01
	flatHigh = 0.95
	// flatTol is how close two readings must be, as a share of capacity,
	// to count as the same value: float noise only.
	flatTol = 1e-6
)

// flatMeter follows the run of equal meter readings of one site, in
// interval order. The zero value has seen nothing.
type flatMeter struct {
	value      float64       // MW, the run's value
	start, end time.Time     // first interval start and last interval end of the run
	covered    time.Duration // the intervals of the run's readings, summed
	n          int           // readings in the run; 0: no run (none yet, or outside the band)
	raised     bool
}

// observe judges reading r of a site of capacity capMW against a limit of
// limit (positive) and returns the alarm transition it causes, if any.
// Readings that do not follow the run in time (late ones filling a gap),
// curtailed ones (a plant held at a set-point is still by order) and
// missing values change nothing. A reading equal to the run's value
// extends it, across a gap in the readings too (meter_gap tells of gaps);
// any other value ends it, and clears a raised alarm. The run is judged by
// the time its readings cover, not by its span: a gap neither ends it nor
// counts (GEFCom2012 wind's 48-hour gaps, judged by span, joined two
// ordinary runs of one value into a false alarm).
func (f *flatMeter) observe(site string, r *model.Reading, capMW float64, limit time.Duration) (conformal.Event, bool) {
	v := r.PowerMW
	if r.Curtailed || math.IsNaN(v) || !(capMW > 0) || r.IntervalStart.Before(f.end) {
		return conformal.Event{}, false
	}
	if f.n > 0 && math.Abs(v-f.value) <= flatTol*capMW {
		f.end = r.End()
		f.covered += r.End().Sub(r.IntervalStart)
		f.n++
		if f.raised || f.covered < limit {
			return conformal.Event{}, false
		}
		f.raised = true
		return conformal.Event{
			Site: site, Kind: KindMeterFlat, State: conformal.StateRaised, Window: f.n, EventTime: f.end.UTC(),
			Reason: fmt.Sprintf("the meter has read %.6g MW (%.1f %% of capacity) for %s, %d readings since %s (limit %s)",
				f.value, 100*f.value/capMW, f.covered, f.n, f.start.UTC().Format(time.RFC3339), limit),
		}, true
	}
	was, old, since := f.raised, f.value, f.covered
	*f = flatMeter{start: r.IntervalStart, end: r.End()}
	if v > flatLow*capMW && v < flatHigh*capMW {
		f.value, f.n, f.covered = v, 1, r.End().Sub(r.IntervalStart)
	}
	if !was {
		return conformal.Event{}, false
	}
	return conformal.Event{
		Site: site, Kind: KindMeterFlat, State: conformal.StateCleared, Window: 1, EventTime: r.End().UTC(),
		Reason: fmt.Sprintf("the meter moved from %.6g to %.6g MW after %s of readings at one value", old, v, since),
	}, true
}
