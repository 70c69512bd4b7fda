package stream

import (
	"bytes"
	"cmp"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"reflect"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// Defaults of the Decoder options.
const (
	// DefaultMaxBytes is the largest payload a Decoder accepts by default (1 MiB).
	DefaultMaxBytes = 1 << 20
	// DefaultMaxRows is the largest batch a Decoder accepts by default.
	DefaultMaxRows = 10000
	// DefaultPowerFactor: by default a reading may exceed the site's capacity
	// by 10 % (metering error, a plant slightly above its nameplate).
	DefaultPowerFactor = 1.1
	// NegativePowerTolerance is how far below zero a reading may go, as a
	// share of the site's capacity: a plant draws a little power for its own
	// use at night and meters have offsets. Readings below it are refused.
	NegativePowerTolerance = 0.02
	// MaxIntervalMinutes is the longest meter or valid interval (one day).
	MaxIntervalMinutes = 1440
)

// Plausibility limits on times (see ReasonBadTime).
const (
	minUnix        = 631152000  // 1990-01-01T00:00:00Z
	maxUnix        = 7258118400 // 2200-01-01T00:00:00Z (excluded)
	maxValidBefore = 10 * 24 * time.Hour
	maxValidAfter  = 16 * 24 * time.Hour
	maxBatchSpan   = 31 * 24 * time.Hour
)

// Decoder turns JSON input messages into model values, checking everything a
// site actor relies on. A message is all or nothing: either every row is
// valid and all are returned, or the first fault (in row order) is returned
// as a *RejectError and nothing else.
//
// The zero value rejects every message (it knows no site); set Sites. A
// Decoder is safe for concurrent use as long as its fields, including the
// Sites map, are not modified meanwhile: to change the registry, build a new
// Decoder.
//
// # Meter messages
//
// One JSON object or a non-empty array of objects:
//
//	{"site":"pv-a","interval_start":"2026-03-01T10:00:00Z","interval_minutes":15,
//	 "power_mw":3.2,"availability":0.9,"curtailed":false}
//
// site, interval_start (RFC 3339), interval_minutes and power_mw are
// required; availability (0..1, default 1) and curtailed (default false) are
// optional and may be null. Other fields are ignored.
//
// # Weather messages
//
// One JSON object or a non-empty array of objects, each a flat row of one
// weather run:
//
//	{"site":"pv-a","issued_at":"2026-03-01T06:00:00Z","source":"model-x",
//	 "valid_start":"2026-03-01T10:00:00Z","valid_minutes":60,"ghi_wm2":512.3,"temp_c":null}
//
// site, issued_at, valid_start and valid_minutes are required; source is an
// optional string. Every other field is a weather variable: its name must be
// lowercase <quantity>_<unit> (letters, digits and '_', starting with a
// letter), its value a JSON number or null (a missing value, NaN in
// model.WeatherRow). A row must give at least one variable. Rows are grouped
// into runs by (site, issued_at, source).
//
// # Numbers
//
// A number may not be NaN or infinite in any spelling: a string such as
// "NaN" or "-Infinity", the non-standard bare tokens NaN and Infinity, or a
// JSON number beyond the float64 range all give ReasonNotFinite. Any other
// string where a number belongs is ReasonMalformed.
type Decoder struct {
	// Sites is the site registry by id. A site missing from it is unknown;
	// a nil or empty map makes every message unknown_site. Only CapacityMW
	// is used here, for the power range check.
	Sites map[string]model.Site
	// MaxBytes is the largest payload accepted; 0 means DefaultMaxBytes and
	// a negative value means no limit.
	MaxBytes int
	// MaxRows is the largest number of rows in one message; 0 means
	// DefaultMaxRows and a negative value means no limit.
	MaxRows int
	// PowerFactor bounds a reading from above: power_mw may not exceed
	// PowerFactor times the site's capacity. Zero, negative and NaN mean
	// DefaultPowerFactor.
	PowerFactor float64
}

func (d *Decoder) maxBytes() int {
	if d.MaxBytes == 0 {
		return DefaultMaxBytes
	}
	return d.MaxBytes
}

func (d *Decoder) maxRows() int {
	if d.MaxRows == 0 {
		return DefaultMaxRows
	}
	return d.MaxRows
}

func (d *Decoder) powerFactor() float64 {
	if d.PowerFactor > 0 && !math.IsInf(d.PowerFactor, 0) {
		return d.PowerFactor
	}
	return DefaultPowerFactor
}

// Meter decodes a meter message received on the subject of subjectSite (see
// Decoder for the format). Every row's site must equal subjectSite; an empty
// subjectSite (a message read from a file, say) lifts that rule and then
// each row's site only needs to be known. Readings come back in message
// order, times in UTC. Every error is a *RejectError.
func (d *Decoder) Meter(subjectSite string, data []byte) ([]model.Reading, error) {
	return d.meter(subjectSite, data, true)
}

// meter is Meter. With fast set, plain input is read by scratch.meterRows
// (see scan.go); otherwise, and whenever that gives up, by meterRowsJSON.
// Both give the same rows, so everything after is common.
func (d *Decoder) meter(subjectSite string, data []byte, fast bool) ([]model.Reading, error) {
	if err := d.precheck(subjectSite, data); err != nil {
		return nil, err
	}
	sc := getScratch()
	defer putScratch(sc)
	var rows []meterWire
	ok := false
	if fast {
		rows, ok = sc.meterRows(data, d.maxRows())
	}
	if !ok {
		var rerr *RejectError
		if rows, rerr = meterRowsJSON(subjectSite, data); rerr != nil {
			return nil, rerr
		}
	}
	batch := firstByte(data) == '['
	if err := d.checkRows(subjectSite, len(rows)); err != nil {
		return nil, err
	}

	out := make([]model.Reading, len(rows))
	var lo, hi time.Time
	for i := range rows {
		at := rowOf(batch, i)
		if err := d.meterRow(&out[i], subjectSite, at, &rows[i]); err != nil {
			return nil, err
		}
		if t := out[i].IntervalStart; i == 0 || t.Before(lo) {
			lo = t
		}
		if t := out[i].IntervalStart; i == 0 || t.After(hi) {
			hi = t
		}
	}
	if span := hi.Sub(lo); span > maxBatchSpan {
		return nil, &RejectError{Reason: ReasonBadTime, Site: out[0].Site,
			Detail: fmt.Sprintf("readings span %v (from %s to %s), more than 31 days", span,
				lo.Format(time.RFC3339), hi.Format(time.RFC3339))}
	}
	return out, nil
}

// meterRowsJSON reads the rows of a meter message with encoding/json; it
// takes any input and maps every JSON fault to its reject.
func meterRowsJSON(subj string, data []byte) ([]meterWire, *RejectError) {
	var rows []meterWire
	switch firstByte(data) {
	case '{':
		rows = make([]meterWire, 1)
		if err := json.Unmarshal(data, &rows[0]); err != nil {
			return nil, jsonReject(subj, data, err)
		}
	case '[':
		if err := json.Unmarshal(data, &rows); err != nil {
			return nil, jsonReject(subj, data, err)
		}
	default:
		return nil, notObject(subj)
	}
	return rows, nil
}

// meterWire is one meter row as sent. The custom field types record what
// they saw so that every fault maps to its own reason.
type meterWire struct {
	Site            wireString `json:"site"`
	IntervalStart   wireTime   `json:"interval_start"`
	IntervalMinutes wireNum    `json:"interval_minutes"`
	PowerMW         wireNum    `json:"power_mw"`
	Availability    wireNum    `json:"availability"`
	Curtailed       wireBool   `json:"curtailed"`
}

func (d *Decoder) meterRow(r *model.Reading, subj string, at rowRef, w *meterWire) *RejectError {
	if w.Site.st == stWrongType {
		return wrongType(subj, at, "site", "a string")
	}
	site := w.Site.s
	s, rerr := d.rowSite(subj, at, site, w.Site.st == stOK)
	if rerr != nil {
		return rerr
	}
	r.Site = site
	if r.IntervalStart, rerr = w.IntervalStart.get(site, at, "interval_start"); rerr != nil {
		return rerr
	}
	if r.IntervalMinutes, rerr = w.IntervalMinutes.minutes(site, at, "interval_minutes"); rerr != nil {
		return rerr
	}
	if rerr = checkAligned(site, at, "interval_start", r.IntervalStart, r.IntervalMinutes); rerr != nil {
		return rerr
	}
	if r.PowerMW, rerr = w.PowerMW.get(site, at, "power_mw", true); rerr != nil {
		return rerr
	}
	if r.Availability, rerr = w.Availability.get(site, at, "availability", false); rerr != nil {
		return rerr
	}
	if w.Availability.st == stAbsent || w.Availability.st == stNull {
		r.Availability = 1
	}
	switch w.Curtailed.st {
	case stWrongType:
		return wrongType(site, at, "curtailed", "a boolean")
	case stOK:
		r.Curtailed = w.Curtailed.b
	}

	lo, hi := -NegativePowerTolerance*s.CapacityMW, d.powerFactor()*s.CapacityMW
	if r.PowerMW < lo || r.PowerMW > hi {
		return &RejectError{Reason: ReasonOutOfRange, Site: site,
			Detail: fmt.Sprintf("%spower_mw %v outside [%v, %v] for capacity %v MW", at, r.PowerMW, lo, hi, s.CapacityMW)}
	}
	if r.Availability < 0 || r.Availability > 1 {
		return &RejectError{Reason: ReasonOutOfRange, Site: site,
			Detail: fmt.Sprintf("%savailability %v outside [0, 1]", at, r.Availability)}
	}
	return nil
}

// Weather decodes a weather message received on the subject of subjectSite
// (see Decoder for the format) into runs, one per (site, issued_at, source)
// found in the message, sorted by site, issue time and source. Each run's
// Vars is the sorted union of the variables its rows give (a variable a row
// does not give is NaN there) and its Rows are sorted by ValidStart; rows of
// one run may not overlap. The site rule is that of Meter. Times are in UTC.
// Every error is a *RejectError.
func (d *Decoder) Weather(subjectSite string, data []byte) ([]model.WeatherRun, error) {
	return d.weather(subjectSite, data, true)
}

// weather is Weather. With fast set, plain input is read by
// scratch.weatherFields (see scan.go); otherwise, and whenever that gives
// up, by scratch.weatherFieldsJSON. Both give the same fields, so
// everything after is common.
func (d *Decoder) weather(subjectSite string, data []byte, fast bool) ([]model.WeatherRun, error) {
	if err := d.precheck(subjectSite, data); err != nil {
		return nil, err
	}
	sc := getScratch()
	defer putScratch(sc)
	if !fast || !sc.weatherFields(data, d.maxRows()) {
		if rerr := sc.weatherFieldsJSON(subjectSite, data); rerr != nil {
			return nil, rerr
		}
	}
	batch := firstByte(data) == '['
	if err := d.checkRows(subjectSite, len(sc.fields)); err != nil {
		return nil, err
	}

	rows := slices.Grow(sc.rows[:0], len(sc.fields))[:len(sc.fields)]
	vals := sc.vals[:0] // the variables of every row, row after row
	for i := range sc.fields {
		r := &rows[i]
		*r = weatherRow{from: len(vals)}
		var rerr *RejectError
		if vals, rerr = d.weatherRow(r, subjectSite, rowOf(batch, i), &sc.fields[i], sc, vals); rerr != nil {
			return nil, rerr
		}
		r.to = len(vals)
	}
	sc.rows, sc.vals = rows, vals
	return groupRuns(rows, vals)
}

// rowFields is one weather row as sent: the raw JSON value of each field,
// nil when the field is absent. vars holds the other fields, the weather
// variables, sorted by name; the names are distinct.
type rowFields struct {
	site, issuedAt, source, validStart, validMinutes []byte
	vars                                             []rawVar
}

type rawVar struct {
	name string
	raw  []byte
}

// weatherFieldsJSON reads the rows of a weather message with encoding/json
// into sc.fields; it takes any input and maps every JSON fault to its
// reject. A field given twice keeps its last value, as encoding/json does
// for maps.
func (sc *scratch) weatherFieldsJSON(subj string, data []byte) *RejectError {
	var objs []map[string]json.RawMessage
	switch firstByte(data) {
	case '{':
		objs = make([]map[string]json.RawMessage, 1)
		if err := json.Unmarshal(data, &objs[0]); err != nil {
			return jsonReject(subj, data, err)
		}
	case '[':
		if err := json.Unmarshal(data, &objs); err != nil {
			return jsonReject(subj, data, err)
		}
	default:
		return notObject(subj)
	}
	fields, vars := sc.fields[:0], sc.vars[:0]
	for _, obj := range objs {
		f := rowFields{site: obj["site"], issuedAt: obj["issued_at"], source: obj["source"],
			validStart: obj["valid_start"], validMinutes: obj["valid_minutes"]}
		from := len(vars)
		for k, raw := range obj {
			switch k {
			case "site", "issued_at", "source", "valid_start", "valid_minutes":
			default:
				vars = append(vars, rawVar{name: k, raw: raw})
			}
		}
		f.vars = sortVars(vars[from:])
		fields = append(fields, f)
	}
	sc.fields, sc.vars = fields, vars
	return nil
}

// sortVars sorts one row's variables by name and returns them, capped so
// that appending to the shared slice they come from cannot touch them.
func sortVars(vars []rawVar) []rawVar {
	slices.SortFunc(vars, func(a, b rawVar) int { return strings.Compare(a.name, b.name) })
	return vars[:len(vars):len(vars)]
}

// weatherRow is one decoded weather row before grouping; its variables are
// vals[from:to] of the shared slice, sorted by name. run is set by
// groupRuns.
type weatherRow struct {
	site     string
	issued   time.Time
	source   string
	start    time.Time
	minutes  int
	from, to int
	run      int
}

type namedValue struct {
	name  string
	value float64
}

// weatherRow checks one row's fields and decodes them into r, appending
// its variables to vals. sc interns the strings.
func (d *Decoder) weatherRow(r *weatherRow, subj string, at rowRef, f *rowFields, sc *scratch,
	vals []namedValue) ([]namedValue, *RejectError) {
	site, isStr := "", false
	if f.site != nil && !isNull(f.site) {
		if site, isStr = sc.str(f.site); !isStr {
			return vals, wrongType(subj, at, "site", "a string")
		}
	}
	if _, rerr := d.rowSite(subj, at, site, isStr); rerr != nil {
		return vals, rerr
	}
	r.site = site

	var rerr *RejectError
	if r.issued, rerr = rawTime(f.issuedAt).get(site, at, "issued_at"); rerr != nil {
		return vals, rerr
	}
	if f.source != nil && !isNull(f.source) {
		var ok bool
		if r.source, ok = sc.str(f.source); !ok {
			return vals, wrongType(site, at, "source", "a string")
		}
	}
	if r.start, rerr = rawTime(f.validStart).get(site, at, "valid_start"); rerr != nil {
		return vals, rerr
	}
	if r.minutes, rerr = rawNum(f.validMinutes).minutes(site, at, "valid_minutes"); rerr != nil {
		return vals, rerr
	}
	if rerr = checkAligned(site, at, "valid_start", r.start, r.minutes); rerr != nil {
		return vals, rerr
	}
	if lead := r.start.Sub(r.issued); lead < -maxValidBefore || lead > maxValidAfter {
		return vals, &RejectError{Reason: ReasonBadTime, Site: site,
			Detail: fmt.Sprintf("%svalid_start %s is %.2f days from issued_at %s, outside -10 to +16 days",
				at, r.start.Format(time.RFC3339), lead.Hours()/24, r.issued.Format(time.RFC3339))}
	}

	if len(f.vars) == 0 {
		return vals, &RejectError{Reason: ReasonMissingField, Site: site,
			Detail: at.String() + "no weather variable"}
	}
	for _, kv := range f.vars {
		k := kv.name
		if !validVarName(k) {
			return vals, &RejectError{Reason: ReasonMalformed, Site: site,
				Detail: fmt.Sprintf("%sfield %s is not a weather variable name (lowercase <quantity>_<unit>)", at, quote(k))}
		}
		n := rawNum(kv.raw)
		v := math.NaN()
		if n.st != stNull {
			var rerr *RejectError
			if v, rerr = n.get(site, at, k, true); rerr != nil {
				return vals, rerr
			}
			if lo, hi, known := varRange(k); known && (v < lo || v > hi) {
				return vals, &RejectError{Reason: ReasonOutOfRange, Site: site,
					Detail: fmt.Sprintf("%s%s %v outside the plausible range [%v, %v]", at, k, v, lo, hi)}
			}
		}
		vals = append(vals, namedValue{name: k, value: v})
	}
	return vals, nil
}

// groupRuns gathers decoded rows into runs and checks that the valid
// intervals of each run do not overlap. It allocates only what it returns
// and a little bookkeeping per run, not per row.
func groupRuns(rows []weatherRow, vals []namedValue) ([]model.WeatherRun, error) {
	type key struct {
		site   string
		issued int64
		source string
	}
	type tally struct {
		key     key
		rows    int
		backing []float64 // the run's values, row after row
	}
	var (
		runs    []model.WeatherRun
		tallies []tally     // of each run
		index   map[key]int // run of each key, made when a second run appears
		last    = -1        // run of the previous row
	)
	for i := range rows {
		r := &rows[i]
		k := key{r.site, r.issued.UnixNano(), r.source}
		j := last
		if j < 0 || tallies[j].key != k {
			var ok bool
			if j, ok = index[k]; !ok {
				j = len(runs)
				runs = append(runs, model.WeatherRun{Site: r.site, IssuedAt: r.issued, Source: r.source})
				tallies = append(tallies, tally{key: k})
				if j == 1 {
					index = map[key]int{tallies[0].key: 0}
				}
				if index != nil {
					index[k] = j
				}
			}
			last = j
		}
		r.run = j
		tallies[j].rows++
		runs[j].Vars = unionSorted(runs[j].Vars, vals[r.from:r.to])
	}

	for j := range runs {
		t := &tallies[j]
		t.backing = make([]float64, t.rows*len(runs[j].Vars))
		for i := range t.backing {
			t.backing[i] = math.NaN()
		}
		runs[j].Rows = make([]model.WeatherRow, 0, t.rows)
	}
	for i := range rows { // in message order, as the stable sort below expects
		r := &rows[i]
		run := &runs[r.run]
		nv, m := len(run.Vars), len(run.Rows)
		values := tallies[r.run].backing[m*nv : (m+1)*nv : (m+1)*nv]
		// Both lists are sorted: walk them together.
		v := 0
		for _, nvv := range vals[r.from:r.to] {
			for run.Vars[v] != nvv.name {
				v++
			}
			values[v] = nvv.value
		}
		run.Rows = append(run.Rows, model.WeatherRow{ValidStart: r.start, ValidMinutes: r.minutes, Values: values})
	}

	for j := range runs {
		run := &runs[j]
		slices.SortStableFunc(run.Rows, func(a, b model.WeatherRow) int { return a.ValidStart.Compare(b.ValidStart) })
		for i := 1; i < len(run.Rows); i++ {
			prev, cur := &run.Rows[i-1], &run.Rows[i]
			if cur.ValidStart.Before(prev.End()) {
				what := "overlap"
				if cur.ValidStart.Equal(prev.ValidStart) {
					what = "repeat"
				}
				return nil, &RejectError{Reason: ReasonBadInterval, Site: run.Site,
					Detail: fmt.Sprintf("run issued at %s, source %s: valid intervals starting %s (%d min) and %s (%d min) %s",
						run.IssuedAt.Format(time.RFC3339), quote(run.Source),
						prev.ValidStart.Format(time.RFC3339), prev.ValidMinutes,
						cur.ValidStart.Format(time.RFC3339), cur.ValidMinutes, what)}
			}
		}
	}
	slices.SortFunc(runs, func(a, b model.WeatherRun) int {
		return cmp.Or(strings.Compare(a.Site, b.Site), a.IssuedAt.Compare(b.IssuedAt), strings.Compare(a.Source, b.Source))
	})
	return runs, nil
}

// unionSorted returns the sorted union of the sorted names in vars and the
// sorted names of add. It returns vars itself when add brings nothing new
// (the common case: every row of a run gives the same variables).
func unionSorted(vars []string, add []namedValue) []string {
	news := 0
	i := 0
	for _, a := range add {
		for i < len(vars) && vars[i] < a.name {
			i++
		}
		if i == len(vars) || vars[i] != a.name {
			news++
		}
	}
	if news == 0 {
		return vars
	}
	out := make([]string, 0, len(vars)+news)
	i = 0
	for _, a := range add {
		for i < len(vars) && vars[i] < a.name {
			out = append(out, vars[i])
			i++
		}
		if i < len(vars) && vars[i] == a.name {
			out = append(out, vars[i])
			i++
		} else {
			out = append(out, a.name)
		}
	}
	return append(out, vars[i:]...)
}

// varRange returns the plausible range of a known weather variable. The
// ranges are wide: they catch unit mix-ups and garbage, not bad forecasts.
// Irradiance may dip a few W/m2 below zero (values de-accumulated from
// model totals do, as in the gefcom2014-solar data set), fractions and
// relative humidity may overshoot slightly (model output).
func varRange(name string) (lo, hi float64, known bool) {
	switch name {
	case "ghi_wm2", "dni_wm2", "dhi_wm2", "ghi_clear_wm2", "dni_clear_wm2", "dhi_clear_wm2",
		"poa_wm2", "toa_net_solar_wm2":
		return -5, 1500, true
	case "lwdown_wm2":
		return 0, 1000, true
	case "temp_c", "temp2m_c", "dewpoint_c":
		return -90, 70, true
	case "wind_ms", "wind10_ms", "wind100_ms", "gust_ms":
		return 0, 100, true
	case "u_ms", "v_ms", "u10_ms", "v10_ms", "u100_ms", "v100_ms":
		return -100, 100, true
	case "wind_dir_deg":
		return 0, 360, true
	case "cloud_frac":
		return -0.01, 1.01, true
	case "rh_pct":
		return 0, 110, true
	case "pressure_hpa":
		return 300, 1100, true
	case "precip_mm":
		return -0.1, 2000, true
	}
	return 0, 0, false
}

// validVarName reports whether name looks like <quantity>_<unit>: 3 to 64
// bytes of lowercase letters, digits and '_', starting with a letter, with
// an '_' that is neither first nor last.
func validVarName(name string) bool {
	if len(name) < 3 || len(name) > 64 || name[0] < 'a' || name[0] > 'z' || name[len(name)-1] == '_' {
		return false
	}
	under := false
	for i := 0; i < len(name); i++ {
		c := name[i]
		switch {
		case c >= 'a' && c <= 'z', c >= '0' && c <= '9':
		case c == '_':
			under = true
		default:
			return false
		}
	}
	return under
}

// precheck applies the checks that need no parsing: size and subject site.
func (d *Decoder) precheck(subj string, data []byte) *RejectError {
	if m := d.maxBytes(); m >= 0 && len(data) > m {
		return &RejectError{Reason: ReasonTooLarge, Site: subj,
			Detail: fmt.Sprintf("payload of %d bytes, more than %d", len(data), m)}
	}
	if subj != "" {
		if _, ok := d.Sites[subj]; !ok {
			return &RejectError{Reason: ReasonUnknownSite, Site: subj, Detail: "subject site is not in the registry"}
		}
	}
	return nil
}

// checkRows refuses empty batches and batches over MaxRows.
func (d *Decoder) checkRows(subj string, n int) *RejectError {
	if n == 0 {
		return &RejectError{Reason: ReasonMalformed, Site: subj, Detail: "empty batch"}
	}
	if m := d.maxRows(); m >= 0 && n > m {
		return &RejectError{Reason: ReasonTooLarge, Site: subj,
			Detail: fmt.Sprintf("batch of %d rows, more than %d", n, m)}
	}
	return nil
}

// rowSite checks the site a row names and returns its registry entry.
func (d *Decoder) rowSite(subj string, at rowRef, site string, present bool) (model.Site, *RejectError) {
	if !present {
		return model.Site{}, &RejectError{Reason: ReasonMissingField, Site: subj, Detail: at.String() + `field "site" is missing`}
	}
	who := site // the site to report: the payload's when readable
	if !model.ValidID(site) {
		who = subj
	}
	if subj != "" && site != subj {
		return model.Site{}, &RejectError{Reason: ReasonSiteMismatch, Site: who,
			Detail: fmt.Sprintf("%spayload site %s on the subject of site %s", at, quote(site), quote(subj))}
	}
	s, ok := d.Sites[site]
	if !ok {
		return model.Site{}, &RejectError{Reason: ReasonUnknownSite, Site: who,
			Detail: fmt.Sprintf("%ssite %s is not in the registry", at, quote(site))}
	}
	return s, nil
}

// checkAligned checks an interval's length (already whole minutes) and that
// it starts on a multiple of its length counted from 00:00 UTC.
func checkAligned(site string, at rowRef, field string, start time.Time, minutes int) *RejectError {
	sec := start.Unix()
	if start.Nanosecond() != 0 || sec%60 != 0 || (sec/60)%MaxIntervalMinutes%int64(minutes) != 0 {
		return &RejectError{Reason: ReasonBadInterval, Site: site,
			Detail: fmt.Sprintf("%s%s %s is not on a multiple of %d minutes from 00:00 UTC",
				at, field, start.Format(time.RFC3339Nano), minutes)}
	}
	return nil
}

// rowRef is the 0-based index of a row in a batch, or -1 for a message
// holding a single object. Its String prefixes reject details.
type rowRef int

func rowOf(batch bool, i int) rowRef {
	if !batch {
		return -1
	}
	return rowRef(i)
}

// String returns "row N: " (1-based) or "" for a single object.
func (r rowRef) String() string {
	if r < 0 {
		return ""
	}
	return "row " + strconv.Itoa(int(r)+1) + ": "
}

// firstByte returns the first byte of data that is not JSON white space, or 0.
func firstByte(data []byte) byte {
	for _, c := range data {
		switch c {
		case ' ', '\t', '\n', '\r':
		default:
			return c
		}
	}
	return 0
}

func notObject(subj string) *RejectError {
	return &RejectError{Reason: ReasonMalformed, Site: subj, Detail: "payload is not a JSON object or array"}
}

func wrongType(site string, at rowRef, field, want string) *RejectError {
	return &RejectError{Reason: ReasonMalformed, Site: site, Detail: fmt.Sprintf("%sfield %s must be %s", at, quote(field), want)}
}

// jsonReject maps an encoding/json error to a RejectError. Bare NaN and
// Infinity tokens (written by some JSON encoders) are not JSON, but they say
// what is wrong better than "invalid character".
func jsonReject(subj string, data []byte, err error) *RejectError {
	var se *json.SyntaxError
	if errors.As(err, &se) {
		if i := int(se.Offset) - 1; i >= 0 && i < len(data) {
			rest := data[i:]
			for _, tok := range []string{"NaN", "Infinity"} {
				if bytes.HasPrefix(rest, []byte(tok)) {
					if i > 0 && data[i-1] == '-' {
						tok, i = "-"+tok, i-1
					}
					return &RejectError{Reason: ReasonNotFinite, Site: subj,
						Detail: fmt.Sprintf("bare %s at byte %d (not JSON)", tok, i)}
				}
			}
		}
		return &RejectError{Reason: ReasonMalformed, Site: subj, Detail: fmt.Sprintf("invalid JSON at byte %d: %v", se.Offset, se)}
	}
	var te *json.UnmarshalTypeError
	if errors.As(err, &te) {
		if te.Field != "" {
			return &RejectError{Reason: ReasonMalformed, Site: subj,
				Detail: fmt.Sprintf("field %s: JSON %s where %s belongs", quote(te.Field), te.Value, goTypeName(te))}
		}
		return &RejectError{Reason: ReasonMalformed, Site: subj,
			Detail: fmt.Sprintf("JSON %s where an object belongs", te.Value)}
	}
	return &RejectError{Reason: ReasonMalformed, Site: subj, Detail: err.Error()}
}

func goTypeName(te *json.UnmarshalTypeError) string {
	if te.Type == nil {
		return "another type"
	}
	switch te.Type.Kind() {
	case reflect.String:
		return "a string"
	case reflect.Bool:
		return "a boolean"
	}
	return "a " + te.Type.String()
}

// Field states recorded by wireNum and wireTime.
type fieldState uint8

const (
	stAbsent    fieldState = iota // not in the object
	stNull                        // JSON null
	stOK                          // a usable value
	stNotFinite                   // NaN or ±Inf in some spelling
	stWrongType                   // some other JSON type
	stBadTime                     // a string that is not an RFC 3339 time
)

// wireNum is a JSON number field that records what it saw instead of failing.
type wireNum struct {
	v   float64
	st  fieldState
	raw string // the offending text, for stNotFinite and stWrongType
}

// UnmarshalJSON implements json.Unmarshaler; it never fails.
func (n *wireNum) UnmarshalJSON(b []byte) error {
	*n = rawNum(b)
	return nil
}

// rawNum reads one JSON value as a number; nil (a missing field) is stAbsent.
func rawNum(b []byte) wireNum {
	if b == nil {
		return wireNum{st: stAbsent}
	}
	switch c := b[0]; {
	case c == 'n':
		return wireNum{st: stNull}
	case c == '-' || (c >= '0' && c <= '9'):
		v, err := strconv.ParseFloat(string(b), 64)
		if err != nil || !model.Finite(v) { // only a range error is possible here
			return wireNum{st: stNotFinite, raw: string(b)}
		}
		return wireNum{v: v, st: stOK}
	case c == '"':
		s, _ := jsonString(b)
		if v, err := strconv.ParseFloat(strings.TrimSpace(s), 64); (err == nil || errors.Is(err, strconv.ErrRange)) && !model.Finite(v) {
			return wireNum{st: stNotFinite, raw: s}
		}
		return wireNum{st: stWrongType, raw: s}
	}
	return wireNum{st: stWrongType, raw: string(b)}
}

// get returns the value of a number field, or the fault it holds. A
// required field must be present and not null; an optional one reads as 0
// then (the caller applies its default).
func (n wireNum) get(site string, at rowRef, field string, required bool) (float64, *RejectError) {
	switch n.st {
	case stOK:
		return n.v, nil
	case stAbsent, stNull:
		if !required {
			return 0, nil
		}
		return 0, &RejectError{Reason: ReasonMissingField, Site: site, Detail: fmt.Sprintf("%sfield %s is missing", at, quote(field))}
	case stNotFinite:
		return 0, &RejectError{Reason: ReasonNotFinite, Site: site, Detail: fmt.Sprintf("%sfield %s is %s", at, quote(field), quote(n.raw))}
	}
	return 0, wrongType(site, at, field, "a number")
}

// minutes returns a required interval length: a whole number in
// 1..MaxIntervalMinutes.
func (n wireNum) minutes(site string, at rowRef, field string) (int, *RejectError) {
	v, rerr := n.get(site, at, field, true)
	if rerr != nil {
		return 0, rerr
	}
	if v != math.Trunc(v) || v < 1 || v > MaxIntervalMinutes {
		return 0, &RejectError{Reason: ReasonBadInterval, Site: site,
			Detail: fmt.Sprintf("%s%s %v is not a whole number of minutes in 1..%d", at, field, v, MaxIntervalMinutes)}
	}
	return int(v), nil
}

// wireString is a JSON string field that records what it saw.
type wireString struct {
	s  string
	st fieldState
}

// UnmarshalJSON implements json.Unmarshaler; it never fails.
func (w *wireString) UnmarshalJSON(b []byte) error {
	*w = rawString(nil, b)
	return nil
}

// rawString reads one JSON value as a string field, interned by sc when
// not nil.
func rawString(sc *scratch, b []byte) wireString {
	switch s, ok := sc.str(b); {
	case ok:
		return wireString{s: s, st: stOK}
	case isNull(b):
		return wireString{st: stNull}
	}
	return wireString{st: stWrongType}
}

// wireBool is a JSON boolean field that records what it saw.
type wireBool struct {
	b  bool
	st fieldState
}

// UnmarshalJSON implements json.Unmarshaler; it never fails.
func (w *wireBool) UnmarshalJSON(b []byte) error {
	switch string(b) {
	case "true", "false":
		*w = wireBool{b: b[0] == 't', st: stOK}
	case "null":
		*w = wireBool{st: stNull}
	default:
		*w = wireBool{st: stWrongType}
	}
	return nil
}

// wireTime is a JSON RFC 3339 time field that records what it saw.
type wireTime struct {
	t   time.Time
	st  fieldState
	raw string // the offending text, for stBadTime and stWrongType
}

// UnmarshalJSON implements json.Unmarshaler; it never fails.
func (w *wireTime) UnmarshalJSON(b []byte) error {
	*w = rawTime(b)
	return nil
}

// rawTime reads one JSON value as a time; nil (a missing field) is stAbsent.
func rawTime(b []byte) wireTime {
	if b == nil {
		return wireTime{st: stAbsent}
	}
	switch b[0] {
	case 'n':
		return wireTime{st: stNull}
	case '"':
		text, _ := jsonText(b)
		// string(text) does not allocate: time.Parse keeps no reference.
		t, err := time.Parse(time.RFC3339, string(text))
		if err != nil {
			return wireTime{st: stBadTime, raw: string(text)}
		}
		return wireTime{t: t.UTC(), st: stOK}
	}
	return wireTime{st: stWrongType, raw: string(b)}
}

// get returns a required time, checked to lie in [1990, 2200).
func (w wireTime) get(site string, at rowRef, field string) (time.Time, *RejectError) {
	switch w.st {
	case stOK:
		if u := w.t.Unix(); u < minUnix || u >= maxUnix {
			return time.Time{}, &RejectError{Reason: ReasonBadTime, Site: site,
				Detail: fmt.Sprintf("%s%s %s is before 1990 or after 2199", at, field, w.t.Format(time.RFC3339))}
		}
		return w.t, nil
	case stAbsent, stNull:
		return time.Time{}, &RejectError{Reason: ReasonMissingField, Site: site, Detail: fmt.Sprintf("%sfield %s is missing", at, quote(field))}
	case stBadTime:
		return time.Time{}, &RejectError{Reason: ReasonBadTime, Site: site,
			Detail: fmt.Sprintf("%s%s %s is not an RFC 3339 time", at, field, quote(w.raw))}
	}
	return time.Time{}, wrongType(site, at, field, "an RFC 3339 time string")
}

// isNull reports whether a raw JSON value is null.
func isNull(b []byte) bool { return len(b) > 0 && b[0] == 'n' }

// jsonString returns the text of a raw JSON string value (valid JSON, as
// handed out by encoding/json or jsontext), and false when the value is not
// a string.
func jsonString(b []byte) (string, bool) {
	text, ok := jsonText(b)
	return string(text), ok
}

// jsonText is jsonString without the conversion: it returns b's own bytes
// when the string has no escape, else a decoded copy.
func jsonText(b []byte) ([]byte, bool) {
	if len(b) < 2 || b[0] != '"' {
		return nil, false
	}
	body := b[1 : len(b)-1]
	if !slices.Contains(body, '\\') {
		return body, true
	}
	var s string
	if err := json.Unmarshal(b, &s); err != nil {
		return nil, false
	}
	return []byte(s), true
}
