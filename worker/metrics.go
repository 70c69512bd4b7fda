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
	// Durable mode (ServeDurable):
	Redelivered     prometheus.Counter
	Snapshots       prometheus.Counter
	SnapshotBytes   prometheus.Histogram
	PartitionsOwned prometheus.Gauge
	Coverage        *prometheus.GaugeVec // by level: coverage pooled over sites and lead buckets
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
		Redelivered: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_inputs_skipped_total", Help: "Stream inputs skipped because their site had already applied them (redeliveries, replays after a restore)."}),
		Snapshots: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "plumb_snapshots_total", Help: "Site snapshots taken."}),
		SnapshotBytes: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "plumb_snapshot_bytes", Help: "Size of the site snapshots written.",
			Buckets: prometheus.ExponentialBuckets(1024, 4, 10)}),
		PartitionsOwned: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "plumb_partitions_owned", Help: "Input partitions this worker holds the lease of."}),
		Coverage: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "plumb_live_coverage", Help: "Share of settled outcomes at or below the published quantile of each level since the worker started (or its snapshots), pooled over its sites and lead buckets."}, []string{"level"}),
	}
	if reg != nil {
		reg.MustRegister(m.Inputs, m.Rejects, m.Refreshes, m.Published, m.Coalesced, m.Settled,
			m.RefreshSeconds, m.QueueDepth, m.QueueFull, m.AlarmsActive, m.AlarmEvents,
			m.Redelivered, m.Snapshots, m.SnapshotBytes, m.PartitionsOwned, m.Coverage)
	}
	return m
}
