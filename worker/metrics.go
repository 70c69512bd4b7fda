package worker

import "github.com/prometheus/client_golang/prometheus"

// Metrics are the worker's Prometheus metrics. A nil *Metrics is valid and
// records nothing.
type Metrics struct {
	Inputs         *prometheus.CounterVec // by kind: weather, meter
	Rejects        *prometheus.CounterVec // by reason
	Refreshes      prometheus.Counter
	Published      prometheus.Counter
	Coalesced      prometheus.Counter
	Settled        prometheus.Counter
	RefreshSeconds prometheus.Histogram
	QueueDepth     prometheus.Gauge
	QueueFull      prometheus.Counter
	AlarmsActive   prometheus.Gauge
	AlarmEvents    *prometheus.CounterVec // by kind and state
}

// NewMetrics creates the worker's metrics and registers them with reg (nil:
// not registered).
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		Inputs: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "plumb_inputs_total", Help: "Input messages applied, by kind."}, []string{"kind"}),
		Rejects: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "plumb_rejects_total", Help: "Input messages rejected, by reason."}, []string{"reason"}),
		Refreshes: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_refreshes_total", Help: "Bundles computed."}),
		Published: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_bundles_published_total", Help: "Bundles published."}),
		Coalesced: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_bundles_coalesced_total", Help: "Bundles not published because a newer one for the same site was already queued."}),
		Settled: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_readings_settled_total", Help: "Meter readings that settled pending forecasts."}),
		RefreshSeconds: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "plumb_refresh_seconds", Help: "Time to apply one input and refresh the site's bundle.",
			Buckets: prometheus.ExponentialBuckets(5e-6, 2.5, 12)}),
		QueueDepth: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "plumb_queue_depth", Help: "Inputs waiting in the worker's queues."}),
		QueueFull: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_queue_full_total", Help: "Times an input waited because its shard's queue was full."}),
		AlarmsActive: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "plumb_alarms_active", Help: "Alarms currently raised."}),
		AlarmEvents: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "plumb_alarm_events_total", Help: "Alarm transitions, by kind and state."}, []string{"kind", "state"}),
	}
	if reg != nil {
		reg.MustRegister(m.Inputs, m.Rejects, m.Refreshes, m.Published, m.Coalesced, m.Settled,
			m.RefreshSeconds, m.QueueDepth, m.QueueFull, m.AlarmsActive, m.AlarmEvents)
	}
	return m
}
