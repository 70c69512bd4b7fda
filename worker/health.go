package worker

import (
	"context"
	"fmt"
	"strconv"
	"sync/atomic"
	"time"

	"go.uber.org/zap"

	"github.com/plumb-forecast/plumb/conformal"
)

// Alarm kinds raised by the pool's health checks, on wall time.
const (
	// KindWeatherStale: no weather run for a site for longer than expected.
	KindWeatherStale = "weather_stale"
	// KindMeterGap: no meter reading for a site for longer than expected.
	KindMeterGap = "meter_gap"
	// KindRejectRate: a high share of a site's input messages is rejected.
	KindRejectRate = "reject_rate"
)

// HealthOptions configures the pool's input health checks. They run on
// wall time (PoolOptions.Clock), the only place the worker uses it. Zero
// fields take the documented defaults; a negative duration turns its check
// off.
type HealthOptions struct {
	// Every is how often the checks run; 0 means 30 s.
	Every time.Duration
	// StaleWeather raises weather_stale when a site's last weather run
	// arrived longer ago; 0 means 12 h (runs come every 1 to 6 h).
	StaleWeather time.Duration
	// MeterGap raises meter_gap when a site's last reading arrived longer
	// ago; 0 means 1 h (meters report every 5 to 15 minutes).
	MeterGap time.Duration
	// RejectRate raises reject_rate when more than this share of a site's
	// messages since the previous check were rejected (at least MinInputs
	// of them); it clears below RejectClear. 0 means 0.2 and 0.05.
	RejectRate, RejectClear float64
	// MinInputs is the fewest messages between two checks for the reject
	// rate to be judged; 0 means 20.
	MinInputs int
}

func (o HealthOptions) withDefaults() HealthOptions {
	if o.Every == 0 {
		o.Every = 30 * time.Second
	}
	if o.StaleWeather == 0 {
		o.StaleWeather = 12 * time.Hour
	}
	if o.MeterGap == 0 {
		o.MeterGap = time.Hour
	}
	if o.RejectRate == 0 {
		o.RejectRate = 0.2
	}
	if o.RejectClear == 0 {
		o.RejectClear = 0.05
	}
	if o.MinInputs == 0 {
		o.MinInputs = 20
	}
	return o
}

// siteHealth is what the health checks know of one site. The counters are
// written by the site's shard and read by the checker.
type siteHealth struct {
	lastWeather, lastMeter atomic.Int64 // wall time, unix ns; 0 never
	inputs, rejects        atomic.Int64
	// Checker state, only touched by the checker goroutine.
	seenInputs, seenRejects int64
	raised                  map[string]bool
}

// runHealth checks every site's inputs until ctx is done.
func (p *Pool) runHealth(ctx context.Context) {
	o := p.o.Health
	if o.Every < 0 {
		return
	}
	t := time.NewTicker(o.Every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			p.checkHealth(p.o.Clock())
			p.updateCoverage(ctx)
		}
	}
}

// checkHealth runs the checks once at wall time now.
func (p *Pool) checkHealth(now time.Time) {
	o := p.o.Health
	for _, id := range p.order {
		h := p.health[id]
		since := func(ns int64) time.Duration {
			if ns == 0 {
				return now.Sub(p.started)
			}
			return now.Sub(time.Unix(0, ns))
		}
		if o.StaleWeather > 0 {
			age := since(h.lastWeather.Load())
			p.setHealth(id, h, KindWeatherStale, age > o.StaleWeather, now,
				fmt.Sprintf("no weather run for %s (limit %s)", age.Round(time.Second), o.StaleWeather))
		}
		if o.MeterGap > 0 {
			age := since(h.lastMeter.Load())
			p.setHealth(id, h, KindMeterGap, age > o.MeterGap, now,
				fmt.Sprintf("no meter reading for %s (limit %s)", age.Round(time.Second), o.MeterGap))
		}
		in, rej := h.inputs.Load(), h.rejects.Load()
		dIn, dRej := in-h.seenInputs, rej-h.seenRejects
		if dIn >= int64(o.MinInputs) {
			h.seenInputs, h.seenRejects = in, rej
			rate := float64(dRej) / float64(dIn)
			bad := rate > o.RejectRate || (h.raised[KindRejectRate] && rate >= o.RejectClear)
			p.setHealth(id, h, KindRejectRate, bad, now,
				fmt.Sprintf("%d of the last %d input messages rejected (%.0f %%; raise above %.0f %%, clear below %.0f %%)",
					dRej, dIn, 100*rate, 100*o.RejectRate, 100*o.RejectClear))
		}
	}
}

// setHealth moves one health alarm to state bad and publishes the
// transition, if any. Event time is the wall time of the check: these
// alarms are about the feed, not the data.
func (p *Pool) setHealth(site string, h *siteHealth, kind string, bad bool, now time.Time, reason string) {
	if h.raised[kind] == bad {
		return
	}
	h.raised[kind] = bad
	ev := conformal.Event{Site: site, Kind: kind, State: conformal.StateCleared, EventTime: now.UTC(), Reason: reason}
	if bad {
		ev.State = conformal.StateRaised
		p.m.AlarmsActive.Inc()
	} else {
		p.m.AlarmsActive.Dec()
		ev.Reason = "back to normal: " + reason
	}
	p.m.AlarmEvents.WithLabelValues(kind, ev.State).Inc()
	if err := p.out.Alarm(ev); err != nil {
		p.log.Warn("publish alarm", zap.String("site", site), zap.Error(err))
	}
}

// updateCoverage sets the live coverage gauge of each level, pooled over
// the sites and lead buckets.
func (p *Pool) updateCoverage(ctx context.Context) {
	stats, err := p.Stats(ctx)
	if err != nil {
		return
	}
	var hits, n []float64
	var levels []float64
	for _, s := range stats {
		for j, l := range s.Levels {
			if j >= len(levels) {
				levels = append(levels, l.Level)
				hits, n = append(hits, 0), append(n, 0)
			}
			hits[j] += l.Coverage * float64(l.Settled)
			n[j] += float64(l.Settled)
		}
	}
	for j, l := range levels {
		if n[j] > 0 {
			p.m.Coverage.WithLabelValues(strconv.FormatFloat(l, 'f', -1, 64)).Set(hits[j] / n[j])
		}
	}
}
