// Package loadgen measures a worker under load: it invents a fleet of N
// sites, publishes their meter readings and hourly weather runs at a chosen
// speed-up of event time, and times each bundle from the publish of the
// reading that caused it to its arrival.
//
// Readings are staggered across each meter interval (site i reports at
// offset i/N of the interval), as meters on a real portfolio do. The data
// is invented: a smooth daily shape with noise, within capacity.
package loadgen

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/worker"
)

// Options configures a load. Zero fields take the documented defaults.
type Options struct {
	// Sites is the number of invented sites; 0 means 1000.
	Sites int
	// Speed is how many seconds of event time pass per wall second; 0 means
	// 600 (a 15-minute meter reports every 1.5 s).
	Speed float64
	// Duration of the measured load (wall time); 0 means 60 s.
	Duration time.Duration
	// Warmup is wall time at the start excluded from the latency figures;
	// 0 means 10 s.
	Warmup time.Duration
	// MeterMinutes is the meter interval; 0 means 15.
	MeterMinutes int
	// WeatherEvery is the event time between weather runs of a site; 0
	// means an hour. Each run covers 48 hourly intervals.
	WeatherEvery time.Duration
	// Start is the event time of the first interval; zero means
	// 2026-06-01T00:00:00Z.
	Start time.Time
	// Seed of the invented data; 0 means 1.
	Seed uint64
	// Progress, if set, is called about once a second.
	Progress func(Progress)
}

func (o Options) withDefaults() Options {
	if o.Sites <= 0 {
		o.Sites = 1000
	}
	if o.Speed <= 0 {
		o.Speed = 600
	}
	if o.Duration <= 0 {
		o.Duration = time.Minute
	}
	if o.Warmup <= 0 {
		o.Warmup = 10 * time.Second
	}
	if o.MeterMinutes <= 0 {
		o.MeterMinutes = 15
	}
	if o.WeatherEvery <= 0 {
		o.WeatherEvery = time.Hour
	}
	if o.Start.IsZero() {
		o.Start = time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC)
	}
	if o.Seed == 0 {
		o.Seed = 1
	}
	return o
}

// Progress is a snapshot of a running load.
type Progress struct {
	Elapsed   time.Duration
	Readings  int64
	Runs      int64
	Bundles   int64
	EventTime time.Time
	// P99 of the latencies measured so far (after the warm-up).
	P99 time.Duration
}

// Result is what a load measured; its JSON form is the bench command's output.
type Result struct {
	Sites          int     `json:"sites"`
	Speed          float64 `json:"speed"`
	DurationS      float64 `json:"duration_s"`
	Readings       int64   `json:"readings"`
	Runs           int64   `json:"weather_runs"`
	Bundles        int64   `json:"bundles"`
	ReadingsPerS   float64 `json:"readings_per_s"`
	TargetPerS     float64 `json:"target_readings_per_s"`
	BundlesPerS    float64 `json:"bundles_per_s"`
	LatencyN       int     `json:"latency_samples"`
	LatencyP50Ms   float64 `json:"latency_p50_ms"`
	LatencyP99Ms   float64 `json:"latency_p99_ms"`
	LatencyMaxMs   float64 `json:"latency_max_ms"`
	Lagging        bool    `json:"publisher_lagging"`
	PublishLagMaxS float64 `json:"publisher_lag_max_s"`
}

// Sites returns the invented fleet of a load: half PV (with a location),
// half wind, capacities 5 to 100 MW.
func Sites(n int, seed uint64) []model.Site {
	rng := rand.New(rand.NewPCG(seed, 11))
	out := make([]model.Site, n)
	for i := range out {
		s := model.Site{CapacityMW: math.Round(5+95*rng.Float64()) / 1}
		if i%2 == 0 {
			lat, lon := 40+10*rng.Float64(), -35+10*rng.Float64() // open ocean: invented
			s.ID, s.Kind, s.Lat, s.Lon = "bench-pv-"+strconv.Itoa(i), model.KindPV, &lat, &lon
		} else {
			s.ID, s.Kind = "bench-wind-"+strconv.Itoa(i), model.KindWind
		}
		out[i] = s
	}
	return out
}

// shape is the invented per-unit output of site i at event time t.
func shape(s *model.Site, i int, t time.Time) float64 {
	h := float64(t.Hour()) + float64(t.Minute())/60
	if s.Kind == model.KindPV {
		return math.Max(0, math.Sin((h-6)/12*math.Pi)) * (0.7 + 0.2*math.Sin(float64(t.YearDay()+i)))
	}
	return 0.45 + 0.35*math.Sin(float64(t.Unix())/50000+float64(i))
}

// Run publishes the load on pub and listens for bundles on sub (they may
// be the same connection) until o.Duration has passed, and returns what it
// measured.
func Run(ctx context.Context, pub, sub *nats.Conn, o Options) (Result, error) {
	o = o.withDefaults()
	sites := Sites(o.Sites, o.Seed)
	index := make(map[string]int, len(sites))
	for i, s := range sites {
		index[stream.QuantilesSubject(s.ID)] = i
	}
	// Publish wall time (unix ns) of each site's latest reading.
	last := make([]atomic.Int64, len(sites))
	var (
		mu      sync.Mutex
		lat     []time.Duration
		bundles atomic.Int64
		reads   atomic.Int64
		runs    atomic.Int64
	)
	wall0 := time.Now()
	measureFrom := wall0.Add(o.Warmup)
	s, err := sub.Subscribe(stream.QuantilesWildcard, func(m *nats.Msg) {
		now := time.Now()
		bundles.Add(1)
		i, ok := index[m.Subject]
		if !ok || now.Before(measureFrom) {
			return
		}
		if p := last[i].Load(); p != 0 {
			mu.Lock()
			lat = append(lat, now.Sub(time.Unix(0, p)))
			mu.Unlock()
		}
	})
	if err != nil {
		return Result{}, fmt.Errorf("loadgen: subscribe: %w", err)
	}
	defer s.Unsubscribe()
	s.SetPendingLimits(-1, -1)
	if err := sub.Flush(); err != nil {
		return Result{}, err
	}

	step := time.Duration(o.MeterMinutes) * time.Minute
	wallStep := time.Duration(float64(step) / o.Speed)
	rng := rand.New(rand.NewPCG(o.Seed, 12))
	var buf []byte
	end := wall0.Add(o.Duration)
	var lagMax time.Duration
	nextProgress := wall0.Add(time.Second)
	eventNow := o.Start
	for k := 0; ; k++ {
		intervalStart := o.Start.Add(time.Duration(k) * step)
		intervalEnd := intervalStart.Add(step)
		due0 := wall0.Add(time.Duration(k) * wallStep)
		if !due0.Before(end) {
			break
		}
		weather := k == 0 || intervalEnd.Sub(o.Start)%o.WeatherEvery == 0
		for i := range sites {
			site := &sites[i]
			due := due0.Add(time.Duration(float64(wallStep) * float64(i) / float64(len(sites))))
			if d := time.Until(due); d > 2*time.Millisecond {
				// Sleep in steps of at least 2 ms: finer timers cost more
				// than they buy.
				select {
				case <-time.After(d):
				case <-ctx.Done():
					return Result{}, ctx.Err()
				}
			} else if -d > lagMax {
				lagMax = -d
			}
			// A bundle is timed from the publish of the site's latest input.
			last[i].Store(time.Now().UnixNano())
			if weather {
				run := inventRun(site, i, intervalEnd, rng)
				buf = stream.AppendWeatherJSON(buf[:0], &run)
				if err := pub.Publish(stream.WeatherSubject(site.ID), buf); err != nil {
					return Result{}, fmt.Errorf("loadgen: publish: %w", err)
				}
				runs.Add(1)
			}
			p := site.CapacityMW * math.Min(1, math.Max(0, shape(site, i, intervalStart)*(1+0.1*rng.NormFloat64())))
			rd := model.Reading{Site: site.ID, IntervalStart: intervalStart, IntervalMinutes: o.MeterMinutes, PowerMW: p, Availability: 1}
			buf = stream.AppendMeterJSON(buf[:0], &rd)
			if err := pub.Publish(stream.MeterSubject(site.ID), buf); err != nil {
				return Result{}, fmt.Errorf("loadgen: publish: %w", err)
			}
			reads.Add(1)
			if now := time.Now(); now.After(nextProgress) && o.Progress != nil {
				nextProgress = now.Add(time.Second)
				mu.Lock()
				p99 := percentile(lat, 0.99)
				mu.Unlock()
				o.Progress(Progress{Elapsed: now.Sub(wall0), Readings: reads.Load(), Runs: runs.Load(), Bundles: bundles.Load(), EventTime: eventNow, P99: p99})
			}
		}
		eventNow = intervalEnd
	}
	pub.Flush()
	// Let the last bundles arrive.
	time.Sleep(500 * time.Millisecond)
	sub.Flush()
	elapsed := time.Since(wall0)
	mu.Lock()
	defer mu.Unlock()
	slices.Sort(lat)
	r := Result{
		Sites: o.Sites, Speed: o.Speed, DurationS: elapsed.Seconds(),
		Readings: reads.Load(), Runs: runs.Load(), Bundles: bundles.Load(),
		TargetPerS:     float64(o.Sites) * o.Speed / step.Seconds(),
		LatencyN:       len(lat),
		PublishLagMaxS: lagMax.Seconds(),
		Lagging:        lagMax > wallStep,
	}
	measured := elapsed - o.Warmup
	if measured > 0 {
		r.ReadingsPerS = float64(r.Readings) / elapsed.Seconds()
		r.BundlesPerS = float64(r.Bundles) / elapsed.Seconds()
	}
	if len(lat) > 0 {
		r.LatencyP50Ms = ms(lat[len(lat)/2])
		r.LatencyP99Ms = ms(lat[min(len(lat)-1, len(lat)*99/100)])
		r.LatencyMaxMs = ms(lat[len(lat)-1])
	}
	return r, nil
}

func ms(d time.Duration) float64 { return float64(d) / 1e6 }

// percentile of an unsorted sample (copied); 0 when empty.
func percentile(d []time.Duration, p float64) time.Duration {
	if len(d) == 0 {
		return 0
	}
	c := slices.Clone(d)
	slices.Sort(c)
	return c[min(len(c)-1, int(float64(len(c))*p))]
}

// inventRun returns a 48-hour hourly weather run for site i issued at t.
func inventRun(s *model.Site, i int, t time.Time, rng *rand.Rand) model.WeatherRun {
	run := model.WeatherRun{Site: s.ID, IssuedAt: t}
	if s.Kind == model.KindPV {
		run.Vars = []string{"ghi_wm2", "temp_c"}
	} else {
		run.Vars = []string{"temp_c", "wind_ms"}
	}
	first := t.Truncate(time.Hour)
	run.Rows = make([]model.WeatherRow, 48)
	for h := range run.Rows {
		vs := first.Add(time.Duration(h) * time.Hour)
		v := shape(s, i, vs.Add(30*time.Minute)) * (1 + 0.05*rng.NormFloat64())
		row := model.WeatherRow{ValidStart: vs, ValidMinutes: 60}
		if s.Kind == model.KindPV {
			row.Values = []float64{math.Max(0, 1000*v), 15}
		} else {
			row.Values = []float64{12, math.Max(0, 14*v)}
		}
		run.Rows[h] = row
	}
	return run
}

// CatchUpResult is what CatchUp measured.
type CatchUpResult struct {
	Backlog     int     `json:"backlog"`
	PublishS    float64 `json:"publish_s"`
	DrainS      float64 `json:"drain_s"`
	ReadingsPer float64 `json:"readings_per_s"`
}

// CatchUp measures how fast a pool drains a backlog: it subscribes the
// pool to the inputs on nc without running it, publishes backlog readings
// (the invented fleet of o, interval after interval) and flushes them into
// the subscription, then runs the pool and times until every reading is
// applied. The backlog waits in the NATS client and the pool's queues, not
// in a durable stream.
func CatchUp(ctx context.Context, nc *nats.Conn, pool *worker.Pool, o Options, backlog int) (CatchUpResult, error) {
	applied := func() int64 { _, m := pool.Applied(); return m }
	o = o.withDefaults()
	sites := Sites(o.Sites, o.Seed)
	sub, err := nc.Subscribe(stream.InputsWildcard, func(m *nats.Msg) { _ = pool.Submit(m.Subject, m.Data) })
	if err != nil {
		return CatchUpResult{}, fmt.Errorf("loadgen: subscribe: %w", err)
	}
	defer sub.Unsubscribe()
	if err := sub.SetPendingLimits(-1, -1); err != nil {
		return CatchUpResult{}, err
	}
	pub, err := nats.Connect(nc.ConnectedUrl())
	if err != nil {
		return CatchUpResult{}, fmt.Errorf("loadgen: connect: %w", err)
	}
	defer pub.Close()
	step := time.Duration(o.MeterMinutes) * time.Minute
	rng := rand.New(rand.NewPCG(o.Seed, 13))
	var buf []byte
	t0 := time.Now()
	n := 0
	for k := 0; n < backlog; k++ {
		start := o.Start.Add(time.Duration(k) * step)
		for i := range sites {
			if n == backlog {
				break
			}
			site := &sites[i]
			p := site.CapacityMW * math.Min(1, math.Max(0, shape(site, i, start)*(1+0.1*rng.NormFloat64())))
			rd := model.Reading{Site: site.ID, IntervalStart: start, IntervalMinutes: o.MeterMinutes, PowerMW: p, Availability: 1}
			buf = stream.AppendMeterJSON(buf[:0], &rd)
			if err := pub.Publish(stream.MeterSubject(site.ID), buf); err != nil {
				return CatchUpResult{}, fmt.Errorf("loadgen: publish: %w", err)
			}
			n++
		}
	}
	if err := pub.Flush(); err != nil {
		return CatchUpResult{}, err
	}
	// Wait until the subscription has received the whole backlog: handed
	// to the pool (whose queues fill, then block the callback) or waiting
	// in the client.
	for deadline := time.Now().Add(5 * time.Minute); ; {
		d, _ := sub.Delivered()
		pending, _, _ := sub.Pending()
		if d+int64(pending) >= int64(backlog) {
			break
		}
		if time.Now().After(deadline) {
			return CatchUpResult{}, fmt.Errorf("loadgen: backlog not delivered within 5 minutes")
		}
		time.Sleep(10 * time.Millisecond)
	}
	res := CatchUpResult{Backlog: backlog, PublishS: time.Since(t0).Seconds()}
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan error, 1)
	t1 := time.Now()
	go func() { done <- pool.Run(runCtx) }()
	next := t1.Add(time.Second)
	for applied() < int64(backlog) {
		select {
		case <-ctx.Done():
			stop()
			<-done
			return res, ctx.Err()
		case <-time.After(5 * time.Millisecond):
		}
		if now := time.Now(); o.Progress != nil && now.After(next) {
			next = now.Add(time.Second)
			o.Progress(Progress{Elapsed: now.Sub(t1), Readings: applied()})
		}
	}
	res.DrainS = time.Since(t1).Seconds()
	res.ReadingsPer = float64(backlog) / res.DrainS
	stop()
	<-done
	return res, nil
}
