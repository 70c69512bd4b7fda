// Command plumb keeps probabilistic power forecasts of wind and solar sites
// calibrated on a NATS bus. See `plumb help`.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

const usage = `plumb: live, calibrated quantile forecasts of wind and solar output.

Workers on a NATS bus take weather runs and meter readings, refresh each
site's intraday quantile forecast (MW), keep its live coverage on target with
an online conformal step, and publish Arrow quantile bundles and coverage
alarms.

Usage:
  plumb <command> [flags]

Commands:
  demo      the whole job on an invented fleet in one process, in about a minute
  run       a worker: embedded NATS server by default, or --nats URL
  replay    publish a history folder (sites.json, weather.csv.gz, meter.csv.gz) as inputs
  tail      show bundles, alarms and rejects as they are published
  backtest  score a forecast set-up on a history folder: report.json, report.html
  bench     load a worker with invented sites; throughput, latency, CPU and memory

Run 'plumb <command> -h' for the flags and examples of a command.

Forecasts feed trading and dispatch decisions. plumb supports, and does not
replace, the balance responsible party's obligations: follow the market rules
and grid codes that apply, and have alarms reviewed by a qualified person.
`

type command struct {
	name string
	run  func(ctx context.Context, args []string, stdout, stderr io.Writer) error
}

var commands = []command{
	{"demo", runDemo},
	{"run", runWorker},
	{"replay", runReplay},
	{"tail", runTail},
	{"backtest", runBacktest},
	{"bench", runBench},
}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := mainCode(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

func mainCode(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 || args[0] == "help" || args[0] == "-h" || args[0] == "--help" {
		fmt.Fprint(stdout, usage)
		if len(args) == 0 {
			return 2
		}
		return 0
	}
	for _, c := range commands {
		if c.name == args[0] {
			err := c.run(ctx, args[1:], stdout, stderr)
			switch {
			case err == nil:
				return 0
			case errors.Is(err, flag.ErrHelp):
				return 0
			case errors.Is(err, errUsage):
				return 2
			}
			fmt.Fprintf(stderr, "plumb %s: %v\n", c.name, err)
			return 1
		}
	}
	fmt.Fprintf(stderr, "plumb: unknown command %q\n\n%s", args[0], usage)
	return 2
}

// errUsage marks a flag error already reported by the flag set.
var errUsage = errors.New("usage")

// newFlags returns a flag set that prints the given help text and the flags.
func newFlags(name, help string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet("plumb "+name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprint(stderr, help)
		fmt.Fprintln(stderr, "\nFlags:")
		fs.PrintDefaults()
	}
	return fs
}

func parse(fs *flag.FlagSet, args []string) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return errUsage
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(fs.Output(), "unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	}
	return nil
}
