package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/schollz/progressbar/v3"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/worker/backtest"
)

const backtestHelp = `plumb backtest: prove a forecast set-up on a site's history.

It replays a history folder (sites.json, weather.csv[.gz], meter.csv[.gz])
through the same site actors as the live worker, on event time, and scores
every forecast they issue against the meter readings. Climatology (same time
of day, last 30 days) and persistence (with its empirical error quantiles by
lead) always run beside the chosen models as yardsticks.

Two views: intraday (every forecast issued) and day-ahead (forecasts issued
at --day-ahead-hour UTC, leads under 24 h). Scores: mean pinball loss, CRPS,
coverage of each level, central 50/80/90 % intervals (coverage, width,
interval score), Kupiec and Christoffersen p-values, skill against
climatology, and the imbalance cost of bidding the median against bidding
the cost-optimal quantile.

It writes, in --out: report.json (every number), report.html (tables and
plots: reliability, PIT histogram, coverage over time, width by lead, a fan
chart), and forecasts.arrow (the main variant's forecasts issued at
--save-hours, as an Arrow IPC file, to re-score with any tool).

Examples:
  plumb backtest --data ../shared/data/gefcom2012-wind
  plumb backtest --data ../shared/data/gefcom2014-solar --levels percentiles \
      --from 2013-07-01 --to 2014-07-01 --out solar-report
  plumb backtest --data testdata/demo --models baseline --calibrators aci,none
`

func runBacktest(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("backtest", backtestHelp, stderr)
	var (
		dir         = fs.String("data", "", "history `folder` (required)")
		sitesArg    = fs.String("sites", "", "comma-separated site `ids` (default: all)")
		from        = fs.String("from", "", "score forecasts issued from this `time` (default: the start plus --warmup-days)")
		to          = fs.String("to", "", "score forecasts for intervals before this `time` (default: the end)")
		warmup      = fs.Int("warmup-days", 30, "unscored `days` at the start when --from is not given")
		levelsArg   = fs.String("levels", "default", "quantile `levels`: 'default' (0.05..0.95), 'percentiles' (0.01..0.99, as GEFCom) or a list")
		models      = fs.String("models", "stack", "forecasters to run side by side, comma-separated: "+strings.Join(model.Names(), ", "))
		calibrators = fs.String("calibrators", "aci", "calibrators to run with each model, comma-separated: "+strings.Join(conformal.Methods(), ", "))
		gamma       = fs.Float64("gamma", conformal.DefaultGamma, "step size of the aci calibrator: larger follows a change faster, and costs more pinball loss")
		hour        = fs.Int("day-ahead-hour", 0, "UTC `hour` of the forecasts in the day-ahead view")
		issueHours  = fs.String("issue-hours", "", "UTC issue `hours` of the day-ahead view, a list such as 0,12 (each weather run); overrides --day-ahead-hour")
		viewHorizon = fs.Duration("view-horizon", 24*time.Hour, "leads the day-ahead view keeps: under this `duration`")
		bandsArg    = fs.String("bands", "", "lead bands of the by-lead tables, as `edges` in hours such as 0,6,24,48 (default: the worker's lead buckets)")
		costShort   = fs.Float64("cost-short", backtest.DefaultCostShort, "imbalance cost per MWh delivered short of the bid (default illustrative)")
		costLong    = fs.Float64("cost-long", backtest.DefaultCostLong, "imbalance cost per MWh delivered beyond the bid (default illustrative)")
		currency    = fs.String("currency", "EUR", "currency of the costs")
		fanSite     = fs.String("fan-site", "", "site of the fan chart (default: the first)")
		saveHours   = fs.String("save-hours", "", "UTC issue `hours` of the forecasts saved to forecasts.arrow: a list, 'all' or 'none' (default: the day-ahead hour)")
		out         = fs.String("out", "backtest-report", "output `folder`")
		quiet       = fs.Bool("quiet", false, "no progress bar")
	)
	if err := parse(fs, args); err != nil {
		return err
	}
	if *dir == "" {
		fmt.Fprintln(stderr, "plumb backtest: --data is required")
		fs.Usage()
		return errUsage
	}
	levels, err := model.ParseLevels(*levelsArg)
	if err != nil {
		return err
	}
	var lo history.LoadOptions
	if *sitesArg != "" {
		lo.Sites = strings.Split(*sitesArg, ",")
	}
	o := backtest.Options{
		Data:         *dir,
		DayAheadHour: *hour,
		Warmup:       time.Duration(*warmup) * 24 * time.Hour,
		Costs:        backtest.Costs{Short: *costShort, Long: *costLong, Currency: *currency},
		FanSite:      *fanSite,
	}
	o.Worker.Levels = levels
	o.Worker.Calibrator.Gamma = *gamma
	if o.From, err = parseTimeFlag("from", *from); err != nil {
		return err
	}
	if o.To, err = parseTimeFlag("to", *to); err != nil {
		return err
	}
	if *issueHours != "" {
		if o.IssueHours, err = parseHours("issue-hours", *issueHours); err != nil {
			return err
		}
	}
	if *viewHorizon <= 0 {
		return fmt.Errorf("--view-horizon %s must be positive", *viewHorizon)
	}
	o.ViewHorizon = *viewHorizon
	if *bandsArg != "" {
		if o.Bands, err = parseBands(*bandsArg); err != nil {
			return err
		}
	}
	for _, m := range strings.Split(*models, ",") {
		for _, c := range strings.Split(*calibrators, ",") {
			o.Variants = append(o.Variants, backtest.VariantSpec{Model: strings.TrimSpace(m), Calibrator: strings.TrimSpace(c)})
		}
	}
	switch *saveHours {
	case "":
	case "none":
		o.SaveHours = []int{}
	case "all":
		for h := range 24 {
			o.SaveHours = append(o.SaveHours, h)
		}
	default:
		if o.SaveHours, err = parseHours("save-hours", *saveHours); err != nil {
			return err
		}
	}

	t0 := time.Now()
	h, err := history.Load(*dir, lo)
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "loaded %s: %d sites, %d weather runs, %d readings in %s\n",
		*dir, len(h.Sites), len(h.Runs), len(h.Readings), time.Since(t0).Round(time.Millisecond))
	if err := os.MkdirAll(*out, 0o755); err != nil {
		return err
	}
	var ff *stream.ForecastFile
	var ffile *os.File
	if o.SaveHours == nil || len(o.SaveHours) > 0 {
		ffile, err = os.Create(filepath.Join(*out, "forecasts.arrow"))
		if err != nil {
			return err
		}
		defer ffile.Close()
		v := o.Variants[0]
		if ff, err = stream.NewForecastFile(ffile, levels, v.Model, v.Calibrator); err != nil {
			return err
		}
		o.Forecasts = ff
	}
	if !*quiet {
		bar := progressbar.NewOptions(1,
			progressbar.OptionSetWriter(stderr),
			progressbar.OptionSetDescription("backtest"),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionShowCount(),
			progressbar.OptionThrottle(200*time.Millisecond),
			progressbar.OptionOnCompletion(func() { fmt.Fprintln(stderr) }),
		)
		o.Progress = func(done, total int, at time.Time) {
			bar.ChangeMax(total)
			bar.Describe("backtest " + at.Format("2006-01-02"))
			bar.Set(done)
		}
	}
	rep, err := backtest.Run(ctx, h, o)
	if err != nil {
		return err
	}
	if ff != nil {
		if err := ff.Close(); err != nil {
			return err
		}
		if err := ffile.Close(); err != nil {
			return err
		}
	}
	for _, f := range []struct {
		name  string
		write func(io.Writer, *backtest.Report) error
	}{{"report.json", backtest.WriteJSON}, {"report.html", backtest.WriteHTML}} {
		if err := writeFile(filepath.Join(*out, f.name), func(w io.Writer) error { return f.write(w, rep) }); err != nil {
			return err
		}
	}
	printSummary(stdout, rep)
	fmt.Fprintf(stdout, "\nwrote %s/report.html, report.json%s in %s\n", *out,
		map[bool]string{true: ", forecasts.arrow", false: ""}[ff != nil], time.Since(t0).Round(time.Millisecond))
	return nil
}

func writeFile(path string, write func(io.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	bw := bufio.NewWriter(f)
	if err := write(bw); err != nil {
		f.Close()
		return fmt.Errorf("%s: %w", path, err)
	}
	if err := bw.Flush(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// printSummary writes the comparison table.
func printSummary(w io.Writer, r *backtest.Report) {
	fmt.Fprintf(w, "backtest of %s, %d sites, forecasts from %s to %s, %d levels\n\n",
		r.Data, len(r.Sites), r.From.Format("2006-01-02"), r.To.Format("2006-01-02"), len(r.Levels))
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "variant\tview\tforecasts\tpinball\tCRPS\tskill\tcov 80%\tcov 90%\tIS 90%\t")
	for _, v := range r.Variants {
		name := v.Name
		if v.Reference {
			name += " (ref)"
		}
		for _, vw := range []struct {
			label string
			s     backtest.Scores
		}{{dayAheadLabel(r), v.DayAhead.All}, {"intraday", v.Intraday.All}} {
			cov80, cov90, is90 := "-", "-", "-"
			for _, iv := range vw.s.Intervals {
				switch iv.Nominal {
				case 0.8:
					cov80 = fmt.Sprintf("%.3f", iv.Coverage)
				case 0.9:
					cov90 = fmt.Sprintf("%.3f", iv.Coverage)
					is90 = fmt.Sprintf("%.4f", iv.Score)
				}
			}
			fmt.Fprintf(tw, "%s\t%s\t%d\t%.5f\t%.5f\t%.3f\t%s\t%s\t%s\t\n",
				name, vw.label, vw.s.N, vw.s.Pinball, vw.s.CRPS, vw.s.Skill, cov80, cov90, is90)
		}
	}
	tw.Flush()
	for _, view := range []string{dayAheadLabel(r), "intraday"} {
		fmt.Fprintf(w, "\nmean pinball by lead, %s view\n", view)
		tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprint(tw, "variant\t")
		for _, b := range r.Buckets {
			fmt.Fprintf(tw, "%s\t", b)
		}
		fmt.Fprintln(tw)
		for _, v := range r.Variants {
			vw := v.Intraday
			if view != "intraday" {
				vw = v.DayAhead
			}
			fmt.Fprintf(tw, "%s\t", v.Name)
			for _, s := range vw.ByBucket {
				if s.N == 0 {
					fmt.Fprint(tw, "-\t")
				} else {
					fmt.Fprintf(tw, "%.5g\t", s.Pinball)
				}
			}
			fmt.Fprintln(tw)
		}
		tw.Flush()
	}
	for _, v := range r.Variants {
		if v.Reference || len(v.Alarms) == 0 {
			continue
		}
		byKind := map[string]int{}
		var kinds []string
		for _, a := range v.Alarms {
			if byKind[a.Kind] == 0 {
				kinds = append(kinds, a.Kind)
			}
			byKind[a.Kind] += a.Raised
		}
		fmt.Fprintf(w, "\nalarms raised by %s:", v.Name)
		for _, k := range kinds {
			fmt.Fprintf(w, " %s %d", k, byKind[k])
		}
		fmt.Fprintln(w)
	}
	if r.Refused > 0 {
		fmt.Fprintf(w, "\n%d inputs were refused by the site actors (late, duplicate or too far ahead)\n", r.Refused)
	}
}

// dayAheadLabel names the day-ahead view by its issue hours: "day-ahead
// 00h" or "day-ahead 00h,12h".
func dayAheadLabel(r *backtest.Report) string {
	hours := r.IssueHours
	if len(hours) == 0 {
		hours = []int{r.DayAheadHour}
	}
	hs := make([]string, len(hours))
	for i, h := range hours {
		hs[i] = fmt.Sprintf("%02dh", h)
	}
	return "day-ahead " + strings.Join(hs, ",")
}

// parseHours reads a comma-separated list of UTC hours 0..23.
func parseHours(flagName, s string) ([]int, error) {
	var out []int
	for _, f := range strings.Split(s, ",") {
		h, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || h < 0 || h > 23 {
			return nil, fmt.Errorf("--%s: %q is not an hour 0..23", flagName, f)
		}
		out = append(out, h)
	}
	return out, nil
}

// parseBands reads lead band edges in hours ("0,6,24,48"), increasing from 0.
func parseBands(s string) (model.Buckets, error) {
	var b model.Buckets
	for i, f := range strings.Split(s, ",") {
		h, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		m := int(math.Round(h * 60))
		switch {
		case err != nil || h < 0:
			return b, fmt.Errorf("--bands: %q is not a lead in hours", f)
		case i == 0 && m != 0:
			return b, fmt.Errorf("--bands: the first edge must be 0, not %q", f)
		case i > 0 && m <= b.Edges[i-1]:
			return b, fmt.Errorf("--bands: edges must increase (%q)", f)
		}
		b.Edges = append(b.Edges, m)
	}
	return b, nil
}
