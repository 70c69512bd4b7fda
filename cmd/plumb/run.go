package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/worker"
)

const runHelp = `plumb run: a forecasting worker.

It subscribes to the input subjects (plumb.in.weather.<site>,
plumb.in.meter.<site>), keeps one actor per site of the registry, and
publishes a quantile bundle (plumb.out.quantiles.<site>, Arrow IPC) after
every input, coverage alarms (plumb.out.alarms.<site>, JSON) and rejected
inputs (plumb.out.rejects, JSON).

Without --nats it starts an embedded NATS server with JetStream, listening on
--listen, so that other processes (plumb replay, plumb tail, your own
producers and bots) can connect to it.

With --durable the inputs are read from the input stream PLUMB_INPUTS
(JetStream; made if missing) with acknowledgements; each site's whole state
is snapshot to the KV bucket plumb_snapshots every --snapshot-every inputs and
on a graceful stop (SIGINT, SIGTERM); the sites are spread over --partitions
partitions, and workers sharing the inputs take partitions through leases in
the KV bucket plumb_leases, picking up a dead worker's partitions after
--lease-ttl. A worker that restarts, or takes over, restores the snapshots
and replays the stream from there: its state is as if it had never stopped.
Publish inputs with message ids (plumb replay --durable does) so that the
stream drops duplicates.

Examples:
  plumb run --sites ../shared/data/gefcom2012-wind/sites.json
  plumb run --sites sites.json --nats nats://nats-1:4222,nats://nats-2:4222 --creds worker.creds
  plumb run --sites sites.json --levels percentiles --calibrator none
  plumb run --sites sites.json --durable --store /var/lib/plumb/nats
  plumb run --sites sites.json --durable --worker-id w2 --nats nats://127.0.0.1:4222
`

// workerFlags are the forecasting settings shared by run and demo.
type workerFlags struct {
	model      string
	levels     string
	horizon    time.Duration
	calibrator string
	gamma      float64
	window     int
	tolerance  float64
	alarmZ     float64
	alarmRec   float64
	alarmHist  float64
	meterFlat  time.Duration
	shards     int
	reorder    time.Duration
}

func (w *workerFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&w.model, "model", "stack", "forecaster: "+strings.Join(model.Names(), ", ")+" (stack: forest on the weather plus intraday updating, the most accurate; baseline: lighter, for very large portfolios on one machine)")
	fs.StringVar(&w.levels, "levels", "default", "quantile `levels`: 'default' (0.05..0.95 by 0.05), 'percentiles' (0.01..0.99) or a list such as 0.1,0.5,0.9")
	fs.DurationVar(&w.horizon, "horizon", 0, "how far ahead a bundle reaches (0: to the end of the next UTC day, at least 36h)")
	fs.StringVar(&w.calibrator, "calibrator", "aci", "online calibrator per lead bucket and level: "+strings.Join(conformal.Methods(), ", ")+
		" (aci: adaptive conformal inference; pid: quantile tracker with integrator; dtaci: ACI with self-tuned step; split: rolling split conformal; none: the raw model)")
	fs.Float64Var(&w.gamma, "gamma", conformal.DefaultGamma, "step size of the aci calibrator: larger follows a change faster, and costs more pinball loss")
	fs.IntVar(&w.window, "coverage-window", 672, "settled forecasts per lead bucket and level over which the rolling coverage is taken (live summary, metrics, /coverage/<site>)")
	fs.Float64Var(&w.tolerance, "alarm-tolerance", conformal.DefaultAlarmTolerance, "raise an alarm only when the recent coverage (weighted to the last 96 settled forecasts of a lead bucket and level: a day of 15-minute intervals) is at least this far from the level (coverage_off) or from the raw model's own history (raw_drift)")
	fs.Float64Var(&w.alarmZ, "alarm-z", conformal.DefaultAlarmZ, "and only when that gap is at least this many times its usual spread at the site, lead bucket and level (larger: fewer alarms, later)")
	fs.Float64Var(&w.alarmRec, "alarm-recent", conformal.DefaultAlarmRecent, "half-life, in settled forecasts of a lead bucket and level, of the recent coverage the alarms judge (96: a day of 15-minute meters; an hourly meter's day is 24)")
	fs.Float64Var(&w.alarmHist, "alarm-history", conformal.DefaultAlarmReference, "half-life, in settled forecasts, of the longer-run coverage and of the usual spread the alarms compare with; no alarm changes state before a quarter of it has settled (2688: four weeks of 15-minute meters)")
	fs.DurationVar(&w.meterFlat, "meter-flat", worker.DefaultMeterFlat, "raise meter_flat when a site's meter has read one value between 1 % and 95 % of capacity for this long of event time (a stuck meter or a frozen feed; the open data's longest such run is 10h; negative: off)")
	fs.IntVar(&w.shards, "shards", 2, "goroutines the site actors are spread over")
	fs.DurationVar(&w.reorder, "reorder-window", 0, "hold each input until one this much later in event time has come, and apply them in event-time order: inputs shuffled within the window (several meter gateways, retries) then give exactly the state inputs in order give, and bundles lag by the window (0: apply on arrival; at most 6h, the lateness)")
}

func (w *workerFlags) config() (worker.Config, error) {
	levels, err := model.ParseLevels(w.levels)
	if err != nil {
		return worker.Config{}, err
	}
	if w.horizon < 0 {
		return worker.Config{}, fmt.Errorf("--horizon %s is negative", w.horizon)
	}
	if w.reorder < 0 || w.reorder > 6*time.Hour {
		return worker.Config{}, fmt.Errorf("--reorder-window %s must lie between 0 and 6h (the lateness)", w.reorder)
	}
	if w.meterFlat == 0 {
		return worker.Config{}, fmt.Errorf("--meter-flat 0: give how long a meter may read one value, or a negative duration to turn the check off")
	}
	if w.gamma <= 0 || w.gamma >= 1 {
		return worker.Config{}, fmt.Errorf("--gamma %v must lie in (0, 1)", w.gamma)
	}
	cfg := worker.Config{
		Levels:         levels,
		HorizonMinutes: int(w.horizon / time.Minute),
		CoverageWindow: w.window,
		Calibrator:     conformal.Options{Method: w.calibrator, Gamma: w.gamma},
		Alarm:          conformal.AlarmOptions{Tolerance: w.tolerance, Z: w.alarmZ, Recent: w.alarmRec, Reference: w.alarmHist},
		RawAlarm:       conformal.AlarmOptions{Tolerance: w.tolerance, Z: w.alarmZ, Recent: w.alarmRec, Reference: w.alarmHist, Kind: conformal.KindRawDrift},
		Reorder:        w.reorder,
		MeterFlat:      w.meterFlat,
	}
	if _, err := conformal.New(0.5, cfg.Calibrator); err != nil {
		return worker.Config{}, err
	}
	if _, err := conformal.NewAlarm(cfg.Alarm); err != nil {
		return worker.Config{}, fmt.Errorf("--alarm-tolerance %v, --alarm-z %v, --alarm-recent %v, --alarm-history %v: %w", w.tolerance, w.alarmZ, w.alarmRec, w.alarmHist, err)
	}
	probe := model.Site{ID: "probe", Kind: model.KindWind, CapacityMW: 1}
	if _, err := model.New(w.model, probe, model.DefaultBuckets()); err != nil {
		return worker.Config{}, err
	}
	name, setup := w.model, model.Setup{Buckets: cfg.Buckets, Levels: cfg.Levels}
	cfg.NewForecaster = func(s model.Site) model.Forecaster {
		f, _ := model.Make(name, s, setup) // name checked above
		return f
	}
	return cfg, nil
}

func runWorker(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("run", runHelp, stderr)
	var (
		conn       connFlags
		wf         workerFlags
		sitesPath  = fs.String("sites", "", "site registry: a JSON array of sites (`file`, required)")
		listen     = fs.String("listen", "127.0.0.1:4222", "embedded server's `address` (ignored with --nats); port 0 picks a free one")
		store      = fs.String("store", "", "embedded server's JetStream `folder` (default: a temporary folder removed on exit)")
		metrics    = fs.String("metrics", "127.0.0.1:9464", "serve Prometheus metrics (/metrics) and each site's coverage monitor as JSON (/coverage/<site>) on this `address` ('' to turn off)")
		logFormat  = fs.String("log-format", "console", "log format: console or json")
		logLevel   = fs.String("log-level", "info", "log level: debug, info, warn, error")
		maxPayload = fs.Int("max-input-bytes", 1<<20, "largest input message accepted, in bytes")
		stale      = fs.Duration("stale-weather", 12*time.Hour, "raise weather_stale when a site's last weather run arrived longer ago (wall time; negative: off)")
		gap        = fs.Duration("meter-gap", time.Hour, "raise meter_gap when a site's last reading arrived longer ago (wall time; negative: off)")
		rejectRate = fs.Float64("reject-rate", 0.2, "raise reject_rate when more than this share of a site's messages is rejected")
		durable    = fs.Bool("durable", false, "read inputs from the input stream (JetStream) with acks, snapshot each site's state to a KV bucket, and share partitions of sites with other workers through leases; a restart resumes exactly")
		workerID   = fs.String("worker-id", "", "this worker's `name` among the workers sharing the inputs (default: host name and process id)")
		partitions = fs.Int("partitions", jet.DefaultPartitions, "partitions the sites are spread over (fixed when the input stream is created)")
		replicas   = fs.Int("replicas", jet.DefaultReplicas, "copies of the streams and buckets kept in a NATS cluster")
		snapEvery  = fs.Int("snapshot-every", 500, "snapshot a site after this many inputs")
		snapAfter  = fs.Duration("snapshot-interval", time.Minute, "and at least this often while it has new inputs (negative: only by count)")
		leaseTTL   = fs.Duration("lease-ttl", jet.DefaultLeaseTTL, "how long a partition's lease lasts unrenewed: a dead worker's partitions move after this")
	)
	conn.register(fs, "", "NATS server `URL`s, comma-separated (default: start an embedded server)")
	wf.register(fs)
	if err := parse(fs, args); err != nil {
		return err
	}
	if *sitesPath == "" {
		fmt.Fprintln(stderr, "plumb run: --sites is required")
		fs.Usage()
		return errUsage
	}
	log, err := newLogger(*logFormat, *logLevel, zapcore.Lock(zapcore.AddSync(stderr)))
	if err != nil {
		return err
	}
	defer log.Sync()
	sites, err := model.LoadSites(*sitesPath)
	if err != nil {
		return err
	}
	cfg, err := wf.config()
	if err != nil {
		return err
	}

	if conn.o.URL == "" {
		if *durable && *store == "" {
			log.Warn("--durable with the embedded server and no --store: the streams and snapshots live in a temporary folder removed on exit, so a restart starts afresh; give --store to keep them")
		}
		host, portStr, err := net.SplitHostPort(*listen)
		if err != nil {
			return fmt.Errorf("--listen %q: %w", *listen, err)
		}
		port, err := strconv.Atoi(portStr)
		if err != nil {
			return fmt.Errorf("--listen %q: bad port", *listen)
		}
		if port == 0 {
			port = -1
		}
		emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Host: host, Port: port, StoreDir: *store})
		if err != nil {
			return err
		}
		defer emb.Shutdown()
		conn.o.URL = emb.URL()
		log.Info("embedded NATS server with JetStream listening", zap.String("url", emb.URL()))
		fmt.Fprintf(stdout, "embedded NATS server listening on %s\n", emb.URL())
	}
	nc, err := conn.connect("plumb-worker", log)
	if err != nil {
		return err
	}
	defer nc.Close()

	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	m := worker.NewMetrics(reg)
	po := worker.PoolOptions{
		Shards:        wf.shards,
		Decoder:       stream.Decoder{MaxBytes: *maxPayload},
		Health:        worker.HealthOptions{StaleWeather: *stale, MeterGap: *gap, RejectRate: *rejectRate},
		Logger:        log,
		Metrics:       m,
		SnapshotEvery: *snapEvery,
	}
	var snaps *worker.DurableSnapshots
	if *durable {
		snaps = worker.NewDurableSnapshots(0)
		po.OnSnapshot = snaps.Hook
		if *workerID == "" {
			host, _ := os.Hostname()
			*workerID = fmt.Sprintf("%s-%d", host, os.Getpid())
		}
	}
	pool, err := worker.NewPool(sites, cfg, worker.NewNATSOutput(nc), po)
	if err != nil {
		return err
	}
	if *metrics != "" {
		stop, addr, err := serveMetrics(*metrics, reg, pool)
		if err != nil {
			log.Warn("metrics endpoint not started", zap.Error(err))
		} else {
			defer stop()
			log.Info("metrics", zap.String("url", "http://"+addr+"/metrics"), zap.String("coverage", "http://"+addr+"/coverage/<site>"))
		}
	}
	ready := make(chan struct{})
	go func() {
		<-ready
		log.Info("worker ready", zap.Int("sites", len(sites)), zap.String("nats", nc.ConnectedUrlRedacted()),
			zap.Int("levels", len(cfg.Levels)), zap.String("calibrator", wf.calibrator))
		fmt.Fprintf(stdout, "worker ready: %d sites; inputs on plumb.in.{weather,meter}.<site>; try: plumb tail --nats %s\n",
			len(sites), nc.ConnectedUrlRedacted())
	}()
	if *durable {
		err = worker.ServeDurable(ctx, nc, pool, snaps, worker.DurableOptions{
			Layout:           jet.Layout{Partitions: *partitions, Replicas: *replicas, LeaseTTL: *leaseTTL},
			WorkerID:         *workerID,
			SnapshotInterval: *snapAfter,
			Logger:           log,
			Metrics:          m,
		}, ready)
	} else {
		err = worker.Serve(ctx, nc, pool, ready)
	}
	log.Info("worker stopped")
	return err
}

// coverageHandler answers GET /coverage/<site> with the site's coverage
// monitor (worker.CellReport, one per lead bucket and level) as JSON: 404
// for a site not in the registry or not held by this worker.
func coverageHandler(pool *worker.Pool) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		site := r.PathValue("site")
		ctx, cancel := context.WithTimeout(r.Context(), 5*time.Second)
		defer cancel()
		cells, err := pool.Coverage(ctx, site)
		switch {
		case errors.Is(err, worker.ErrUnknownSite) || errors.Is(err, worker.ErrNotHeld):
			http.Error(w, err.Error(), http.StatusNotFound)
			return
		case err != nil:
			http.Error(w, err.Error(), http.StatusServiceUnavailable)
			return
		}
		w.Header().Set("Content-Type", "application/json")
		enc := json.NewEncoder(w)
		enc.SetIndent("", " ")
		if err := enc.Encode(struct {
			Site  string              `json:"site"`
			Cells []worker.CellReport `json:"cells"`
		}{site, cells}); err != nil {
			http.Error(w, err.Error(), http.StatusInternalServerError)
		}
	})
}

// serveMetrics serves reg on addr, and each site's coverage monitor at
// /coverage/<site>, until stop is called.
func serveMetrics(addr string, reg *prometheus.Registry, pool *worker.Pool) (stop func(), bound string, err error) {
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return nil, "", fmt.Errorf("metrics: %w", err)
	}
	mux := http.NewServeMux()
	mux.Handle("/metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{Registry: reg}))
	mux.Handle("GET /coverage/{site}", coverageHandler(pool))
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	go func() {
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			fmt.Fprintln(os.Stderr, "metrics:", err)
		}
	}()
	return func() {
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
		defer cancel()
		srv.Shutdown(ctx)
	}, ln.Addr().String(), nil
}
