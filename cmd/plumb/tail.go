package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"time"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/stream"
)

const tailHelp = `plumb tail: show what workers publish.

Quantile bundles (Arrow IPC on plumb.out.quantiles.<site>) are decoded and
shown as a table of selected lead times (or every step with --all, or as CSV
with --csv); alarms (plumb.out.alarms.<site>) and, with --rejects, rejected
inputs (plumb.out.rejects) are shown one line each.

Examples:
  plumb tail
  plumb tail --site wf1 --csv > wf1.csv
  plumb tail --alarms-only --rejects
`

func runTail(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("tail", tailHelp, stderr)
	var (
		conn       connFlags
		site       = fs.String("site", "", "show one site `id` only (default: every site)")
		csv        = fs.Bool("csv", false, "write bundles as CSV (every step and level, a header once)")
		all        = fs.Bool("all", false, "show every step and level of each bundle")
		alarmsOnly = fs.Bool("alarms-only", false, "show alarms only, no bundles")
		rejects    = fs.Bool("rejects", false, "also show rejected inputs")
		count      = fs.Int("count", 0, "stop after this many bundles (0: run until interrupted)")
	)
	conn.register(fs, defaultURL, "NATS server `URL`s, comma-separated")
	if err := parse(fs, args); err != nil {
		return err
	}
	nc, err := conn.connect("plumb-tail", nil)
	if err != nil {
		return err
	}
	defer nc.Close()

	qSubj, aSubj := stream.QuantilesWildcard, stream.AlarmsWildcard
	if *site != "" {
		qSubj, aSubj = stream.QuantilesSubject(*site), stream.AlarmsSubject(*site)
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	bundles, headerDone := 0, false
	msgs := make(chan *nats.Msg, 1024)
	subscribe := func(subj string) error {
		_, err := nc.ChanSubscribe(subj, msgs)
		if err != nil {
			return fmt.Errorf("subscribe %s: %w", subj, err)
		}
		return nil
	}
	if !*alarmsOnly {
		if err := subscribe(qSubj); err != nil {
			return err
		}
	}
	if err := subscribe(aSubj); err != nil {
		return err
	}
	if *rejects {
		if err := subscribe(stream.RejectsSubject); err != nil {
			return err
		}
	}
	if err := nc.Flush(); err != nil {
		return err
	}
	fmt.Fprintf(stderr, "tailing %s (Ctrl-C to stop)\n", nc.ConnectedUrlRedacted())
	for {
		select {
		case <-ctx.Done():
			return nil
		case m := <-msgs:
			switch {
			case m.Subject == stream.RejectsSubject:
				var r stream.Reject
				if err := json.Unmarshal(m.Data, &r); err != nil {
					fmt.Fprintf(stdout, "REJECT (unreadable: %v)\n", err)
				} else {
					fmt.Fprintf(stdout, "REJECT %s %s on %s: %s\n", r.Reason, r.Site, r.Subject, r.Detail)
				}
			case strings.HasPrefix(m.Subject, "plumb.out.alarms."):
				var e conformal.Event
				if err := json.Unmarshal(m.Data, &e); err != nil {
					fmt.Fprintf(stdout, "ALARM (unreadable: %v)\n", err)
				} else {
					fmt.Fprintln(stdout, alarmLine(e))
				}
			default:
				b, err := stream.DecodeBundle(m.Data)
				if err != nil {
					fmt.Fprintf(stderr, "bundle on %s: %v\n", m.Subject, err)
					break
				}
				if *csv {
					err = stream.WriteBundleCSV(stdout, b, !headerDone)
					headerDone = true
				} else {
					err = stream.WriteBundleTable(stdout, b, stream.TableOptions{AllRows: *all, AllLevels: *all})
				}
				if err != nil {
					return err
				}
				bundles++
				if *count > 0 && bundles >= *count {
					return nil
				}
			}
		}
	}
}

// alarmLine writes one alarm event on one line.
func alarmLine(e conformal.Event) string {
	s := fmt.Sprintf("ALARM %-7s %s %s", e.State, e.EventTime.UTC().Format(time.RFC3339), e.Site)
	if e.Kind != "" {
		s += " " + e.Kind
	}
	if e.Level > 0 {
		s += fmt.Sprintf(" level %.2f", e.Level)
	}
	if e.LeadBucket != "" {
		s += " lead " + e.LeadBucket
	}
	return s + ": " + e.Reason
}
