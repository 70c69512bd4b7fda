package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"runtime"
	"runtime/pprof"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/worker"
	"github.com/plumb-forecast/plumb/worker/loadgen"
)

const benchHelp = `plumb bench: load a worker and measure it.

It invents --sites sites (half PV, half wind), publishes a meter reading per
site every 15 minutes of event time and a weather run per site every hour,
with event time running --speed times faster than real time, readings
staggered across each interval. It reports throughput, the latency from the
publish of a reading to the arrival of the bundle it caused (p50, p99, max),
and CPU and memory per site. By default the worker runs in this process on
an embedded server; with --nats it loads an external worker (start it with
plumb run --sites on the file written by --write-sites).

With --backlog M it measures a catch-up instead: M readings wait for the
worker before it starts, and the time to apply them all is reported.

Examples:
  plumb bench --sites 1000 --duration 30s
  plumb bench --sites 10000 --speed 600 --duration 60s --json bench.json
  plumb bench --sites 10000 --backlog 1000000
  plumb bench --sites 5000 --duration 30s --cpu-profile cpu.prof   # then: go tool pprof -top cpu.prof
`

// BenchResult is the JSON output of plumb bench.
type BenchResult struct {
	Machine      string                 `json:"machine"`
	Load         *loadgen.Result        `json:"load,omitempty"`
	CatchUp      *loadgen.CatchUpResult `json:"catch_up,omitempty"`
	CPUCores     float64                `json:"cpu_cores_used"`
	CPUPerSiteMs float64                `json:"cpu_ms_per_site_per_s"`
	HeapBytes    uint64                 `json:"heap_in_use_bytes"`
	RSSBytes     uint64                 `json:"rss_bytes"`
	PerSiteB     float64                `json:"bytes_per_site"`
}

func runBench(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("bench", benchHelp, stderr)
	var (
		conn       connFlags
		sites      = fs.Int("sites", 1000, "number of invented sites")
		speed      = fs.Float64("speed", 600, "event-time seconds per wall second")
		duration   = fs.Duration("duration", time.Minute, "length of the load")
		warmup     = fs.Duration("warmup", 10*time.Second, "start of the load left out of the latency figures")
		backlog    = fs.Int("backlog", 0, "catch-up mode: readings waiting before the worker starts")
		shards     = fs.Int("shards", 2, "goroutines of the in-process worker")
		modelName  = fs.String("model", "stack", "forecaster of the in-process worker: "+strings.Join(model.Names(), ", "))
		jsonOut    = fs.String("json", "", "also write the result as JSON to this `file`")
		writeSites = fs.String("write-sites", "", "write the invented site registry to this `file` and exit")
		cpuProfile = fs.String("cpu-profile", "", "write a CPU profile of this process over the load or the catch-up to this `file` (read it with: go tool pprof -top <file>)")
	)
	conn.register(fs, "", "load an external worker at this NATS `URL` (default: a worker in this process)")
	if err := parse(fs, args); err != nil {
		return err
	}
	if _, err := model.Make(*modelName, model.Site{ID: "probe", Kind: model.KindWind, CapacityMW: 1}, model.Setup{}); err != nil {
		return err
	}
	if *sites <= 0 || *speed <= 0 || *duration <= 0 {
		return fmt.Errorf("--sites, --speed and --duration must be positive")
	}
	fleet := loadgen.Sites(*sites, 1)
	if *writeSites != "" {
		data, err := json.MarshalIndent(fleet, "", "  ")
		if err != nil {
			return err
		}
		return os.WriteFile(*writeSites, data, 0o644)
	}
	var profFile *os.File // the CPU profile, created before any load starts
	if *cpuProfile != "" {
		f, err := os.Create(*cpuProfile)
		if err != nil {
			return fmt.Errorf("--cpu-profile: %w", err)
		}
		defer f.Close()
		profFile = f
	}
	o := loadgen.Options{Sites: *sites, Speed: *speed, Duration: *duration, Warmup: *warmup}
	o.Progress = func(p loadgen.Progress) {
		fmt.Fprintf(stderr, "\r%5.0fs  readings %9d  runs %8d  bundles %9d  p99 %7.1f ms   ",
			p.Elapsed.Seconds(), p.Readings, p.Runs, p.Bundles, float64(p.P99)/1e6)
	}

	var res BenchResult
	res.Machine = machine()
	var pool *worker.Pool
	if conn.o.URL == "" {
		emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1})
		if err != nil {
			return err
		}
		defer emb.Shutdown()
		conn.o.URL = emb.URL()
		wnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "plumb-bench-worker"})
		if err != nil {
			return err
		}
		defer wnc.Close()
		cfg := worker.Config{}.WithDefaults()
		cfg.NewForecaster = func(s model.Site) model.Forecaster {
			f, _ := model.Make(*modelName, s, model.Setup{Buckets: cfg.Buckets, Levels: cfg.Levels}) // name checked above
			return f
		}
		pool, err = worker.NewPool(fleet, cfg, worker.NewNATSOutput(wnc), worker.PoolOptions{Shards: *shards})
		if err != nil {
			return err
		}
		if *backlog > 0 {
			fmt.Fprintf(stderr, "catch-up: publishing %d readings of %d sites before the worker starts\n", *backlog, *sites)
			if err := startProfile(profFile); err != nil {
				return err
			}
			cpu0 := cpuSeconds()
			r, err := loadgen.CatchUp(ctx, wnc, pool, o, *backlog)
			stopProfile(profFile)
			if err != nil {
				return err
			}
			fmt.Fprintln(stderr)
			res.CatchUp = &r
			res.CPUCores = (cpuSeconds() - cpu0) / (r.PublishS + r.DrainS)
			finishBench(stdout, &res, *sites, *jsonOut)
			return nil
		}
		wctx, stop := context.WithCancel(context.Background())
		ready := make(chan struct{})
		served := make(chan error, 1)
		go func() { served <- worker.Serve(wctx, wnc, pool, ready) }()
		defer func() { stop(); <-served }()
		<-ready
	} else if *backlog > 0 {
		return fmt.Errorf("--backlog needs the in-process worker (no --nats)")
	}
	pub, err := conn.connect("plumb-bench-publish", nil)
	if err != nil {
		return err
	}
	defer pub.Close()
	sub, err := conn.connect("plumb-bench-listen", nil)
	if err != nil {
		return err
	}
	defer sub.Close()
	fmt.Fprintf(stderr, "load: %d sites, %.0f readings/s, %s (first %s not timed)\n",
		*sites, float64(*sites)**speed/900, *duration, *warmup)
	if err := startProfile(profFile); err != nil {
		return err
	}
	cpu0, t0 := cpuSeconds(), time.Now()
	r, err := loadgen.Run(ctx, pub, sub, o)
	stopProfile(profFile)
	if err != nil {
		return err
	}
	fmt.Fprintln(stderr)
	res.Load = &r
	res.CPUCores = (cpuSeconds() - cpu0) / time.Since(t0).Seconds()
	if pool == nil {
		res.CPUCores = 0 // the worker is elsewhere
	}
	finishBench(stdout, &res, *sites, *jsonOut)
	return nil
}

// startProfile starts the CPU profile into f, if not nil (--cpu-profile).
func startProfile(f *os.File) error {
	if f == nil {
		return nil
	}
	if err := pprof.StartCPUProfile(f); err != nil {
		return fmt.Errorf("--cpu-profile: %w", err)
	}
	return nil
}

// stopProfile stops the CPU profile started by startProfile.
func stopProfile(f *os.File) {
	if f != nil {
		pprof.StopCPUProfile()
	}
}

func finishBench(w io.Writer, res *BenchResult, sites int, jsonOut string) {
	runtime.GC()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	res.HeapBytes = ms.HeapInuse
	res.RSSBytes = rss()
	res.PerSiteB = float64(res.RSSBytes) / float64(sites)
	res.CPUPerSiteMs = 1000 * res.CPUCores / float64(sites)
	fmt.Fprintf(w, "machine: %s\n", res.Machine)
	if l := res.Load; l != nil {
		fmt.Fprintf(w, "load: %d sites at %gx: %d readings (%.0f/s, target %.0f/s), %d weather runs, %d bundles (%.0f/s)\n",
			l.Sites, l.Speed, l.Readings, l.ReadingsPerS, l.TargetPerS, l.Runs, l.Bundles, l.BundlesPerS)
		fmt.Fprintf(w, "latency publish -> bundle: p50 %.2f ms, p99 %.2f ms, max %.2f ms over %d bundles\n",
			l.LatencyP50Ms, l.LatencyP99Ms, l.LatencyMaxMs, l.LatencyN)
		if l.Lagging {
			fmt.Fprintf(w, "the publisher fell behind its schedule by up to %.2f s: the machine could not sustain the rate\n", l.PublishLagMaxS)
		}
	}
	if c := res.CatchUp; c != nil {
		fmt.Fprintf(w, "catch-up: %d readings published in %.1f s, applied in %.1f s (%.0f readings/s)\n",
			c.Backlog, c.PublishS, c.DrainS, c.ReadingsPer)
	}
	if res.CPUCores > 0 {
		fmt.Fprintf(w, "cpu: %.2f cores (%.3f ms per site per second)\n", res.CPUCores, res.CPUPerSiteMs)
	}
	fmt.Fprintf(w, "memory: heap in use %.0f MB, resident %.0f MB, %.1f KB per site (server, publisher and listener included)\n",
		float64(res.HeapBytes)/1e6, float64(res.RSSBytes)/1e6, res.PerSiteB/1e3)
	if jsonOut != "" {
		data, _ := json.MarshalIndent(res, "", "  ")
		if err := os.WriteFile(jsonOut, append(data, '\n'), 0o644); err != nil {
			fmt.Fprintln(w, "json:", err)
		}
	}
}

// cpuSeconds returns the process's user and system CPU time.
func cpuSeconds() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return float64(ru.Utime.Sec+ru.Stime.Sec) + float64(ru.Utime.Usec+ru.Stime.Usec)/1e6
}

// rss returns the resident set size from /proc (Linux), else the memory
// the Go runtime holds from the system.
func rss() uint64 {
	data, err := os.ReadFile("/proc/self/status")
	if err == nil {
		for _, line := range strings.Split(string(data), "\n") {
			if f := strings.Fields(line); len(f) >= 2 && f[0] == "VmRSS:" {
				kb, _ := strconv.ParseUint(f[1], 10, 64)
				return kb * 1024
			}
		}
	}
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return ms.Sys
}

// machine names the machine: CPU model and count.
func machine() string {
	name := runtime.GOARCH
	if data, err := os.ReadFile("/proc/cpuinfo"); err == nil {
		for _, line := range strings.Split(string(data), "\n") {
			if k, v, ok := strings.Cut(line, ":"); ok && strings.TrimSpace(k) == "model name" {
				name = strings.TrimSpace(v)
				break
			}
		}
	}
	return fmt.Sprintf("%s, %d CPUs, %s", name, runtime.NumCPU(), runtime.Version())
}
