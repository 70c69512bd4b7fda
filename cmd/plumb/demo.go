package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model/synth"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/worker"
)

const demoHelp = `plumb demo: the whole job in one process, on an invented fleet.

It starts an embedded NATS server and a worker, and replays a few weeks of an
invented fleet (three PV and three wind sites on an invented island, 15-minute
meters, weather runs every 6 hours) generated from a seed. Half way through,
one PV site loses a third of its output: watch the coverage alarms catch it
and the calibrators bring coverage back. A live summary shows refreshes,
coverage per level and alarms; a short report ends the run.

The data is invented (model/synth; a copy is in testdata/demo). Nothing is
downloaded and nothing is written outside a temporary folder.

Examples:
  plumb demo                    # about a minute
  plumb demo --duration 0       # as fast as the machine goes
  plumb demo --calibrator none  # the raw model: compare the coverage
`

func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("demo", demoHelp, stderr)
	var (
		wf       workerFlags
		duration = fs.Duration("duration", time.Minute, "wall-clock time the replay is spread over (0: as fast as possible)")
		seed     = fs.Int64("seed", 1, "seed of the invented fleet")
		days     = fs.Int("days", 28, "days of invented data")
		every    = fs.Duration("every", 2*time.Second, "interval between live summary lines")
	)
	wf.register(fs)
	if err := parse(fs, args); err != nil {
		return err
	}
	cfg, err := wf.config()
	if err != nil {
		return err
	}
	if *days < 4 {
		return fmt.Errorf("--days %d: give at least 4 days", *days)
	}
	fo := synth.FleetOptions{Seed: *seed, Days: *days}
	if err := fo.Validate(); err != nil {
		return err
	}
	fleet := synth.Fleet(fo)
	fault := fo.Fault()
	events := fleet.Events()
	if len(events) == 0 {
		return fmt.Errorf("the invented fleet is empty")
	}
	first, last := events[0].Time, events[len(events)-1].Time
	fmt.Fprintf(stdout, "plumb demo: %d invented sites, %s to %s, %d weather runs, %d readings\n",
		len(fleet.Sites), first.Format("2006-01-02"), last.Format("2006-01-02"), len(fleet.Runs), len(fleet.Readings))
	fmt.Fprintf(stdout, "injected fault: %s output falls to %.0f%% from %s\n\n", fault.Site, 100*fault.Factor, fault.From.Format(time.RFC3339))

	emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1})
	if err != nil {
		return err
	}
	defer emb.Shutdown()
	wnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "plumb-demo-worker"})
	if err != nil {
		return err
	}
	defer wnc.Close()
	pool, err := worker.NewPool(fleet.Sites, cfg, worker.NewNATSOutput(wnc), worker.PoolOptions{Shards: wf.shards})
	if err != nil {
		return err
	}

	// The watcher: what a trading desk's screen would show.
	cnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "plumb-demo-watch"})
	if err != nil {
		return err
	}
	defer cnc.Close()
	var (
		mu      sync.Mutex
		alarms  []conformal.Event
		bundles int
	)
	asub, err := cnc.Subscribe(stream.AlarmsWildcard, func(m *nats.Msg) {
		var e conformal.Event
		if json.Unmarshal(m.Data, &e) == nil {
			mu.Lock()
			alarms = append(alarms, e)
			mu.Unlock()
		}
	})
	if err != nil {
		return err
	}
	qsub, err := cnc.Subscribe(stream.QuantilesWildcard, func(*nats.Msg) {
		mu.Lock()
		bundles++
		mu.Unlock()
	})
	if err != nil {
		return err
	}
	for _, s := range []*nats.Subscription{asub, qsub} {
		s.SetPendingLimits(-1, -1)
	}
	if err := cnc.Flush(); err != nil {
		return err
	}

	wctx, stopWorker := context.WithCancel(context.Background())
	ready := make(chan struct{})
	served := make(chan error, 1)
	go func() { served <- worker.Serve(wctx, wnc, pool, ready) }()
	defer func() {
		stopWorker()
		<-served
	}()
	<-ready

	pnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "plumb-demo-replay"})
	if err != nil {
		return err
	}
	defer pnc.Close()
	speed := 0.0
	if *duration > 0 {
		speed = float64(last.Sub(first)) / float64(*duration)
	}
	var eventNow time.Time
	var pubMu sync.Mutex
	replayed := make(chan error, 1)
	go func() {
		_, err := stream.Replay(ctx, pnc, events, stream.ReplayOptions{Speed: speed, Progress: func(done, total int, at time.Time) {
			pubMu.Lock()
			eventNow = at
			pubMu.Unlock()
		}})
		replayed <- err
	}()

	tick := time.NewTicker(*every)
	defer tick.Stop()
	summary := func() {
		st, err := pool.Stats(ctx)
		if err != nil {
			return
		}
		pubMu.Lock()
		at := eventNow
		pubMu.Unlock()
		mu.Lock()
		nb, na := bundles, activeAlarms(alarms)
		mu.Unlock()
		fmt.Fprintf(stdout, "%s  bundles %7d  alarms up %3d  coverage %s\n", at.Format("2006-01-02 15:04"), nb, na, coverageLine(st))
	}
	for waiting := true; waiting; {
		select {
		case err := <-replayed:
			if err != nil {
				return fmt.Errorf("replay: %w", err)
			}
			waiting = false
		case <-tick.C:
			summary()
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	// Let the worker finish what is queued and the watcher receive it.
	for !pool.Idle() {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
	}
	wnc.Flush()
	cnc.Flush()
	for _, s := range []*nats.Subscription{asub, qsub} {
		for n, _, _ := s.Pending(); n > 0; n, _, _ = s.Pending() {
			time.Sleep(10 * time.Millisecond)
		}
	}
	summary()
	st, err := pool.Stats(ctx)
	if err != nil {
		return err
	}
	mu.Lock()
	defer mu.Unlock()
	writeDemoReport(stdout, st, alarms, fault, bundles)
	return nil
}

// activeAlarms counts raised alarms not yet cleared.
func activeAlarms(evs []conformal.Event) int {
	up := map[string]bool{}
	for _, e := range evs {
		up[alarmKey(e)] = e.State == conformal.StateRaised
	}
	n := 0
	for _, v := range up {
		if v {
			n++
		}
	}
	return n
}

// alarmKey names a site's alarm of a kind: the lead bucket and level of an
// event name the pair that raised or, at the clear, last cleared it.
func alarmKey(e conformal.Event) string {
	return e.Site + "/" + e.Kind
}

var summaryLevels = []float64{0.05, 0.25, 0.5, 0.75, 0.95}

// coverageLine pools the sites' coverage of a few levels.
func coverageLine(st []worker.SiteStats) string {
	var sb strings.Builder
	for _, lvl := range summaryLevels {
		var hits, n float64
		for _, s := range st {
			for _, ls := range s.Levels {
				if ls.Level == lvl {
					hits += ls.Coverage * float64(ls.Settled)
					n += float64(ls.Settled)
				}
			}
		}
		if n == 0 {
			fmt.Fprintf(&sb, " q%.2f  -  ", lvl)
		} else {
			fmt.Fprintf(&sb, " q%.2f %.3f", lvl, hits/n)
		}
	}
	return sb.String()
}

func writeDemoReport(w io.Writer, st []worker.SiteStats, alarms []conformal.Event, fault synth.FaultInfo, bundles int) {
	fmt.Fprintf(w, "\n== report: %d bundles published\n\n", bundles)
	fmt.Fprintln(w, "Live coverage of the published quantiles, all lead times (share of outcomes at or below each quantile; target = level):")
	fmt.Fprintf(w, "%-20s", "site")
	for _, l := range summaryLevels {
		fmt.Fprintf(w, " %7s", fmt.Sprintf("q%.2f", l))
	}
	fmt.Fprintf(w, " %9s %13s %10s\n", "settled", "coverage_off", "raw_drift")
	raisedBy := map[string]int{}
	for _, e := range alarms {
		if e.State == conformal.StateRaised {
			raisedBy[e.Site+"/"+e.Kind]++
		}
	}
	for _, s := range st {
		fmt.Fprintf(w, "%-20s", s.Site)
		n := 0
		for _, lvl := range summaryLevels {
			for _, ls := range s.Levels {
				if ls.Level == lvl {
					fmt.Fprintf(w, " %7.3f", ls.Coverage)
					n = ls.Settled
				}
			}
		}
		fmt.Fprintf(w, " %9d %13d %10d\n", n, raisedBy[s.Site+"/"+conformal.KindCoverage], raisedBy[s.Site+"/"+conformal.KindRawDrift])
	}
	sort.SliceStable(alarms, func(i, j int) bool { return alarms[i].EventTime.Before(alarms[j].EventTime) })
	raised, cleared := 0, 0
	first := map[string]*conformal.Event{} // by kind, on the fault site after the fault
	for i, e := range alarms {
		if e.State != conformal.StateRaised {
			cleared++
			continue
		}
		raised++
		if e.Site == fault.Site && !e.EventTime.Before(fault.From) && first[e.Kind] == nil {
			first[e.Kind] = &alarms[i]
		}
	}
	fmt.Fprintf(w, "\nAlarms (one per site and kind, raised by its first lead bucket and level off, cleared by its last): %d raised, %d cleared, %d still up.\n", raised, cleared, activeAlarms(alarms))
	fmt.Fprintf(w, "Injected fault: %s output falls to %.0f%% from %s.\n", fault.Site, 100*fault.Factor, fault.From.Format(time.RFC3339))
	if len(first) == 0 {
		fmt.Fprintf(w, "Fault NOT caught: no alarm was raised on %s after %s.\n", fault.Site, fault.From.Format(time.RFC3339))
	}
	for _, kind := range []string{conformal.KindRawDrift, conformal.KindCoverage} {
		if e := first[kind]; e != nil {
			fmt.Fprintf(w, "Fault caught: %s alarm raised on %s at %s (level %.2f, lead %s), %s after the fault: %s\n",
				e.Kind, e.Site, e.EventTime.Format(time.RFC3339), e.Level, e.LeadBucket,
				e.EventTime.Sub(fault.From).Round(time.Minute), e.Reason)
		}
	}
	fmt.Fprintln(w, "\nThe fleet is invented. Forecasts feed trading and dispatch decisions: review alarms with a qualified person.")
}
