package main

import (
	"context"
	"fmt"
	"io"
	"strings"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/schollz/progressbar/v3"

	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/stream/jet"
)

const replayHelp = `plumb replay: publish a history folder as live inputs.

The folder holds sites.json, weather.csv[.gz] and meter.csv[.gz] (the
canonical history layout). Every weather run is published as one message on
plumb.in.weather.<site> at its issue time, every meter reading as one message
on plumb.in.meter.<site> at the end of its interval, in event-time order: as
fast as possible, or --speed times faster than real time.

Examples:
  plumb replay --data ../shared/data/gefcom2012-wind
  plumb replay --data testdata/demo --speed 3600        # an hour of data a second
  plumb replay --data ../shared/data/gefcom2014-solar --sites zone1 --from 2013-07-01 --to 2013-08-01
`

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("replay", replayHelp, stderr)
	var (
		conn     connFlags
		dir      = fs.String("data", "", "history `folder` to publish (required)")
		speed    = fs.Float64("speed", 0, "event-time seconds per wall-clock second (0: as fast as possible)")
		sitesArg = fs.String("sites", "", "comma-separated site `ids` to publish (default: all)")
		from     = fs.String("from", "", "publish events at or after this `time` (RFC 3339 or YYYY-MM-DD)")
		to       = fs.String("to", "", "publish events before this `time` (RFC 3339 or YYYY-MM-DD)")
		quiet    = fs.Bool("quiet", false, "no progress bar")
		durable  = fs.Bool("durable", false, "publish to the input stream (JetStream) with message ids, waiting for its acks; the stream must exist (a worker run with --durable makes it)")
	)
	conn.register(fs, defaultURL, "NATS server `URL`s, comma-separated")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *dir == "" {
		fmt.Fprintln(stderr, "plumb replay: --data is required")
		fs.Usage()
		return errUsage
	}
	var o history.LoadOptions
	var err error
	if *sitesArg != "" {
		o.Sites = strings.Split(*sitesArg, ",")
	}
	if o.From, err = parseTimeFlag("from", *from); err != nil {
		return err
	}
	if o.To, err = parseTimeFlag("to", *to); err != nil {
		return err
	}
	if *speed < 0 {
		return fmt.Errorf("--speed %v is negative", *speed)
	}
	t0 := time.Now()
	h, err := history.Load(*dir, o)
	if err != nil {
		return err
	}
	events := h.Events()
	fmt.Fprintf(stderr, "loaded %s: %d sites, %d weather runs, %d readings in %s\n",
		*dir, len(h.Sites), len(h.Runs), len(h.Readings), time.Since(t0).Round(time.Millisecond))
	if len(events) == 0 {
		return fmt.Errorf("nothing to publish in %s for the chosen sites and times", *dir)
	}
	nc, err := conn.connect("plumb-replay", nil)
	if err != nil {
		return err
	}
	defer nc.Close()

	ro := stream.ReplayOptions{Speed: *speed}
	if *durable {
		js, err := jetstream.New(nc)
		if err != nil {
			return err
		}
		if _, err := js.Stream(ctx, jet.InputStream); err != nil {
			return fmt.Errorf("--durable: input stream %s: %w (start a worker with --durable first)", jet.InputStream, err)
		}
		ro.Publisher = jet.NewReplayPublisher(js)
	}
	if !*quiet {
		bar := progressbar.NewOptions(len(events),
			progressbar.OptionSetWriter(stderr),
			progressbar.OptionSetDescription("replay"),
			progressbar.OptionShowCount(),
			progressbar.OptionSetItsString("msg"),
			progressbar.OptionShowIts(),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionThrottle(100*time.Millisecond),
			progressbar.OptionOnCompletion(func() { fmt.Fprintln(stderr) }),
		)
		last := time.Time{}
		ro.Progress = func(done, total int, at time.Time) {
			if at.Sub(last) >= 24*time.Hour || done == total {
				bar.Describe("replay " + at.Format("2006-01-02"))
				last = at
			}
			bar.Set(done)
		}
	}
	st, err := stream.Replay(ctx, nc, events, ro)
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "published %d weather runs and %d readings (%d gaps skipped), %.1f MB, event time %s to %s, in %s\n",
		st.Runs, st.Readings, st.Missing, float64(st.Bytes)/1e6,
		st.First.Format(time.RFC3339), st.Last.Format(time.RFC3339), time.Since(t0).Round(time.Millisecond))
	return nil
}

func parseTimeFlag(name, v string) (time.Time, error) {
	if v == "" {
		return time.Time{}, nil
	}
	for _, layout := range []string{time.RFC3339, "2006-01-02T15:04", "2006-01-02"} {
		if t, err := time.Parse(layout, v); err == nil {
			return t.UTC(), nil
		}
	}
	return time.Time{}, fmt.Errorf("--%s %q: use RFC 3339 (2013-07-01T00:00:00Z) or a date (2013-07-01)", name, v)
}
