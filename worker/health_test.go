package worker

import (
	"context"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// recorder is an Output that keeps what it is given.
type recorder struct {
	mu      sync.Mutex
	bundles int
	alarms  []conformal.Event
	rejects []stream.Reject
}

func (r *recorder) Bundle(*model.Bundle) error { r.mu.Lock(); r.bundles++; r.mu.Unlock(); return nil }
func (r *recorder) Alarm(e conformal.Event) error {
	r.mu.Lock()
	r.alarms = append(r.alarms, e)
	r.mu.Unlock()
	return nil
}
func (r *recorder) Reject(x stream.Reject) error {
	r.mu.Lock()
	r.rejects = append(r.rejects, x)
	r.mu.Unlock()
	return nil
}

func (r *recorder) take() []conformal.Event {
	r.mu.Lock()
	defer r.mu.Unlock()
	a := r.alarms
	r.alarms = nil
	return a
}

func waitIdle(t *testing.T, p *Pool) {
	t.Helper()
	for deadline := time.Now().Add(10 * time.Second); !p.Idle(); {
		if time.Now().After(deadline) {
			t.Fatal("pool not idle after 10 s")
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// TestHealthAlarms drives the wall clock by hand: a site without readings
// raises meter_gap, a reading clears it; a burst of malformed messages
// raises reject_rate, good ones clear it; a stale weather feed raises
// weather_stale.
func TestHealthAlarms(t *testing.T) {
	var now atomic.Int64
	t0 := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	now.Store(t0.UnixNano())
	clock := func() time.Time { return time.Unix(0, now.Load()).UTC() }
	out := &recorder{}
	site := testSites()[1]
	p, err := NewPool([]model.Site{site}, Config{}, out, PoolOptions{Clock: clock, Health: HealthOptions{Every: -1}})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	defer func() { cancel(); <-done }()

	kinds := func(evs []conformal.Event) map[string]string {
		m := map[string]string{}
		for _, e := range evs {
			m[e.Kind] = e.State
		}
		return m
	}
	now.Store(t0.Add(2 * time.Hour).UnixNano())
	p.checkHealth(clock())
	if k := kinds(out.take()); k[KindMeterGap] != conformal.StateRaised || k[KindWeatherStale] != "" {
		t.Fatalf("after 2 h without input: %v, want meter_gap raised only", k)
	}
	f := makeFeed(site, 1, 3)
	p.Submit(stream.WeatherSubject(site.ID), stream.AppendWeatherJSON(nil, &f.runs[0]))
	for i := 0; i < 25; i++ {
		p.Submit(stream.MeterSubject(site.ID), []byte(`{"site":`)) // malformed
	}
	p.Submit(stream.MeterSubject(site.ID), stream.AppendMeterJSON(nil, &f.readings[0]))
	waitIdle(t, p)
	p.checkHealth(clock())
	if k := kinds(out.take()); k[KindMeterGap] != conformal.StateCleared || k[KindRejectRate] != conformal.StateRaised {
		t.Fatalf("after a reading and 25 bad messages: %v, want meter_gap cleared, reject_rate raised", k)
	}
	for i := 1; i < 41; i++ {
		p.Submit(stream.MeterSubject(site.ID), stream.AppendMeterJSON(nil, &f.readings[i]))
	}
	waitIdle(t, p)
	now.Store(t0.Add(2*time.Hour + 30*time.Minute).UnixNano())
	p.checkHealth(clock())
	if k := kinds(out.take()); k[KindRejectRate] != conformal.StateCleared || len(k) != 1 {
		t.Fatalf("after 40 good readings: %v, want reject_rate cleared only", k)
	}
	now.Store(t0.Add(15 * time.Hour).UnixNano())
	p.checkHealth(clock())
	if k := kinds(out.take()); k[KindWeatherStale] != conformal.StateRaised || k[KindMeterGap] != conformal.StateRaised {
		t.Fatalf("13 h later: %v, want weather_stale and meter_gap raised", k)
	}
	p.checkHealth(clock())
	if evs := out.take(); len(evs) != 0 {
		t.Fatalf("a second check repeated %d events: alarms must only report transitions", len(evs))
	}
}
