package history

import (
	"bytes"
	"compress/gzip"
	"encoding/json"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// Write writes h to the folder dir (created if needed) as sites.json
// (indented), weather.csv.gz and meter.csv.gz, replacing those files. It
// refuses a folder holding an uncompressed weather.csv or meter.csv, which
// would make the folder ambiguous.
//
// The output is a function of h's content alone: runs are written in
// (IssuedAt, Site) order, rows in ValidStart order, readings in (End(), Site,
// IntervalStart) order; the gzip header carries no name and no time. Numbers
// are written with strconv's shortest 'f' form, so every finite float64 comes
// back bit for bit; NaN is an empty cell. Callers that want smaller files
// round their values first. The weather header holds the union of the runs'
// variables, sorted; a run without one of them gets empty cells (and NaN
// when loaded back). The availability column is written only when some
// reading's Availability is not 1, the curtailed column only when some
// reading is curtailed.
//
// So that Load reads back what Write wrote, Write rejects (with ErrMalformed)
// an invalid site registry, runs or readings of sites not in h.Sites, runs
// with a non-empty Source (the layout has no source column), two runs of one
// site with the same IssuedAt, overlapping rows in a run, rows whose Values do
// not match Vars, two readings of one site and interval, non-positive
// minutes, infinite values and availabilities outside [0, 1].
func Write(dir string, h *History) error {
	if err := write(dir, h); err != nil {
		return fmt.Errorf("history: write %s: %w", dir, err)
	}
	return nil
}

func write(dir string, h *History) error {
	sitesJSON, err := json.MarshalIndent(h.Sites, "", "  ")
	if err != nil {
		return err
	}
	sitesJSON = append(sitesJSON, '\n')
	if _, err := model.ParseSites(sitesJSON); err != nil {
		return fmt.Errorf("%w: %w", ErrMalformed, err)
	}
	known := make(map[string]bool, len(h.Sites))
	for i := range h.Sites {
		known[h.Sites[i].ID] = true
	}
	weather, err := encodeWeather(h.Runs, known)
	if err != nil {
		return err
	}
	meter, err := encodeMeter(h.Readings, known)
	if err != nil {
		return err
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return err
	}
	for _, base := range []string{WeatherFile, MeterFile} {
		if _, err := os.Stat(filepath.Join(dir, base)); err == nil {
			return fmt.Errorf("%s exists and would shadow %s.gz; remove it first", base, base)
		}
	}
	for _, f := range []struct {
		name string
		data []byte
	}{{SitesFile, sitesJSON}, {WeatherFile + ".gz", weather}, {MeterFile + ".gz", meter}} {
		if err := writeFileAtomic(filepath.Join(dir, f.name), f.data); err != nil {
			return err
		}
	}
	return nil
}

// writeFileAtomic writes data to a temporary file beside path and renames it.
func writeFileAtomic(path string, data []byte) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*")
	if err != nil {
		return err
	}
	_, err = tmp.Write(data)
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Chmod(tmp.Name(), fs.FileMode(0o644))
	}
	if err == nil {
		err = os.Rename(tmp.Name(), path)
	}
	if err != nil {
		os.Remove(tmp.Name())
	}
	return err
}

// gzipped compresses data with a fixed header (no name, no time).
func gzipped(data []byte) ([]byte, error) {
	var out bytes.Buffer
	zw, err := gzip.NewWriterLevel(&out, gzip.BestCompression)
	if err != nil {
		return nil, err
	}
	if _, err := zw.Write(data); err != nil {
		return nil, err
	}
	if err := zw.Close(); err != nil {
		return nil, err
	}
	return out.Bytes(), nil
}

// timeFormatter appends RFC 3339 UTC times, remembering the last one.
type timeFormatter struct {
	t   time.Time
	s   []byte
	set bool
}

func (f *timeFormatter) append(b []byte, t time.Time) []byte {
	if !f.set || !t.Equal(f.t) {
		f.t, f.set = t, true
		f.s = t.UTC().AppendFormat(f.s[:0], time.RFC3339Nano)
	}
	return append(b, f.s...)
}

func appendValue(b []byte, v float64) []byte {
	if math.IsNaN(v) {
		return b
	}
	return strconv.AppendFloat(b, v, 'f', -1, 64)
}

func runName(r *model.WeatherRun) string {
	return fmt.Sprintf("run of site %s issued %s", r.Site, r.IssuedAt.UTC().Format(time.RFC3339Nano))
}

func encodeWeather(runs []model.WeatherRun, known map[string]bool) ([]byte, error) {
	var vars []string
	for i := range runs {
		for _, v := range runs[i].Vars {
			if !slices.Contains(vars, v) {
				vars = append(vars, v)
			}
		}
	}
	slices.Sort(vars)
	for _, v := range vars {
		switch {
		case v == "", v == "site", v == "issued_at", v == "valid_start", v == "valid_minutes",
			strings.ContainsAny(v, ",\"\r\n"):
			return nil, fmt.Errorf("%w: %q cannot name a weather variable", ErrMalformed, v)
		}
	}

	order := make([]int, len(runs))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int { return compareRuns(runs[a], runs[b]) })

	var b []byte
	b = append(b, "site,issued_at,valid_start,valid_minutes"...)
	for _, v := range vars {
		b = append(b, ',')
		b = append(b, v...)
	}
	b = append(b, '\n')
	var issuedF, startF timeFormatter
	col := make([]int, len(vars)) // union column -> index in run.Vars, or -1
	for k, i := range order {
		r := &runs[i]
		switch {
		case !known[r.Site]:
			return nil, fmt.Errorf("%w: %s: site not in the registry", ErrMalformed, runName(r))
		case r.Source != "":
			return nil, fmt.Errorf("%w: %s: source %q: the layout has no source column", ErrMalformed, runName(r), r.Source)
		case k > 0 && compareRuns(runs[order[k-1]], *r) == 0:
			return nil, fmt.Errorf("%w: %s appears twice", ErrMalformed, runName(r))
		}
		for j, v := range vars {
			col[j] = r.Var(v)
		}
		rows := r.Rows
		if !slices.IsSortedFunc(rows, compareRows) {
			rows = slices.Clone(rows)
			slices.SortStableFunc(rows, compareRows)
		}
		for n := range rows {
			row := &rows[n]
			switch {
			case len(row.Values) != len(r.Vars):
				return nil, fmt.Errorf("%w: %s: row at %s has %d values for %d variables", ErrMalformed, runName(r), row.ValidStart.Format(time.RFC3339), len(row.Values), len(r.Vars))
			case row.ValidMinutes <= 0:
				return nil, fmt.Errorf("%w: %s: row at %s: valid_minutes %d must be positive", ErrMalformed, runName(r), row.ValidStart.Format(time.RFC3339), row.ValidMinutes)
			case n > 0 && row.ValidStart.Before(rows[n-1].End()):
				return nil, fmt.Errorf("%w: %s: rows at %s and %s overlap", ErrMalformed, runName(r), rows[n-1].ValidStart.Format(time.RFC3339), row.ValidStart.Format(time.RFC3339))
			}
			b = append(b, r.Site...)
			b = append(b, ',')
			b = issuedF.append(b, r.IssuedAt)
			b = append(b, ',')
			b = startF.append(b, row.ValidStart)
			b = append(b, ',')
			b = strconv.AppendInt(b, int64(row.ValidMinutes), 10)
			for _, c := range col {
				b = append(b, ',')
				if c < 0 {
					continue
				}
				v := row.Values[c]
				if math.IsInf(v, 0) {
					return nil, fmt.Errorf("%w: %s: row at %s: %s is infinite", ErrMalformed, runName(r), row.ValidStart.Format(time.RFC3339), r.Vars[c])
				}
				b = appendValue(b, v)
			}
			b = append(b, '\n')
		}
	}
	return gzipped(b)
}

func encodeMeter(readings []model.Reading, known map[string]bool) ([]byte, error) {
	order := make([]int, len(readings))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int { return compareReadings(readings[a], readings[b]) })
	withAvail, withCurt := false, false
	for i := range readings {
		withAvail = withAvail || readings[i].Availability != 1
		withCurt = withCurt || readings[i].Curtailed
	}

	var b []byte
	b = append(b, "site,interval_start,interval_minutes,power_mw"...)
	if withAvail {
		b = append(b, ","+colAvailability...)
	}
	if withCurt {
		b = append(b, ","+colCurtailed...)
	}
	b = append(b, '\n')
	var startF timeFormatter
	for k, i := range order {
		r := &readings[i]
		name := func() string {
			return fmt.Sprintf("reading of site %s at %s", r.Site, r.IntervalStart.UTC().Format(time.RFC3339Nano))
		}
		switch {
		case !known[r.Site]:
			return nil, fmt.Errorf("%w: %s: site not in the registry", ErrMalformed, name())
		case r.IntervalMinutes <= 0:
			return nil, fmt.Errorf("%w: %s: interval_minutes %d must be positive", ErrMalformed, name(), r.IntervalMinutes)
		case math.IsInf(r.PowerMW, 0):
			return nil, fmt.Errorf("%w: %s: power is infinite", ErrMalformed, name())
		case !(r.Availability >= 0 && r.Availability <= 1):
			return nil, fmt.Errorf("%w: %s: availability %v outside [0, 1]", ErrMalformed, name(), r.Availability)
		case k > 0 && compareReadings(readings[order[k-1]], *r) == 0:
			return nil, fmt.Errorf("%w: %s appears twice", ErrMalformed, name())
		}
		b = append(b, r.Site...)
		b = append(b, ',')
		b = startF.append(b, r.IntervalStart)
		b = append(b, ',')
		b = strconv.AppendInt(b, int64(r.IntervalMinutes), 10)
		b = append(b, ',')
		b = appendValue(b, r.PowerMW)
		if withAvail {
			b = append(b, ',')
			b = appendValue(b, r.Availability)
		}
		if withCurt {
			b = append(b, ',')
			b = strconv.AppendBool(b, r.Curtailed)
		}
		b = append(b, '\n')
	}
	return gzipped(b)
}
