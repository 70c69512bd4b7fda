package history

import (
	"bufio"
	"cmp"
	"compress/gzip"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
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

// LoadOptions selects part of a history folder. The zero value loads all.
type LoadOptions struct {
	// Sites lists the site ids to load; nil loads every site of sites.json.
	// An id that sites.json does not hold is an error (ErrUnknownSite).
	Sites []string
	// From and To bound the event time, half-open [From, To): a run is kept
	// when its IssuedAt is in the window, a reading when its End() is. A zero
	// From or To leaves that side open.
	From, To time.Time
}

func (o *LoadOptions) inWindow(t time.Time) bool {
	if !o.From.IsZero() && t.Before(o.From) {
		return false
	}
	if !o.To.IsZero() && !t.Before(o.To) {
		return false
	}
	return true
}

// Load reads the history folder dir (see the package doc for the layout).
// The returned History holds the selected sites (in the order of sites.json),
// their runs and their readings, sorted as the package doc says. Every row is
// checked, including rows of sites or times that o leaves out.
func Load(dir string, o LoadOptions) (*History, error) {
	h, err := load(dir, o)
	if err != nil {
		return nil, fmt.Errorf("history: load %s: %w", dir, err)
	}
	return h, nil
}

func load(dir string, o LoadOptions) (*History, error) {
	data, err := os.ReadFile(filepath.Join(dir, SitesFile))
	if err != nil {
		return nil, err
	}
	sites, err := model.ParseSites(data)
	if err != nil {
		return nil, &ParseError{File: SitesFile, Err: err}
	}
	index := make(map[string]int, len(sites))
	for i := range sites {
		index[sites[i].ID] = i
	}
	selected := make([]bool, len(sites))
	if o.Sites == nil {
		for i := range selected {
			selected[i] = true
		}
	}
	for _, id := range o.Sites {
		i, ok := index[id]
		if !ok {
			return nil, fmt.Errorf("%w %q: not in %s", ErrUnknownSite, id, SitesFile)
		}
		selected[i] = true
	}
	h := &History{}
	for i := range sites {
		if selected[i] {
			h.Sites = append(h.Sites, sites[i])
		}
	}
	p := &parser{sites: sites, index: index, selected: selected, opts: &o}
	if h.Runs, err = p.loadWeather(dir); err != nil {
		return nil, err
	}
	if h.Readings, err = p.loadMeter(dir); err != nil {
		return nil, err
	}
	return h, nil
}

// parser holds what loading the two CSV files shares.
type parser struct {
	sites    []model.Site
	index    map[string]int
	selected []bool
	opts     *LoadOptions
}

// csvFile is one open CSV file of the folder.
type csvFile struct {
	name   string // base name as found, e.g. "weather.csv.gz"
	f      *os.File
	gz     *gzip.Reader
	r      *csv.Reader
	header []string
	col    map[string]int
}

// openCSV opens base+".gz" or base, whichever exists, and reads its header.
func openCSV(dir, base string) (*csvFile, error) {
	plain := filepath.Join(dir, base)
	zipped := plain + ".gz"
	_, errPlain := os.Stat(plain)
	_, errZipped := os.Stat(zipped)
	switch {
	case errPlain == nil && errZipped == nil:
		return nil, fmt.Errorf("%w: both %s and %s.gz exist; keep one", ErrMalformed, base, base)
	case errZipped == nil:
		plain = zipped
	case errPlain != nil && errors.Is(errPlain, fs.ErrNotExist) && errors.Is(errZipped, fs.ErrNotExist):
		return nil, fmt.Errorf("%s or %s.gz: %w", base, base, fs.ErrNotExist)
	case errPlain != nil && errors.Is(errPlain, fs.ErrNotExist):
		return nil, errZipped
	case errPlain != nil:
		return nil, errPlain
	}
	c := &csvFile{name: filepath.Base(plain)}
	var err error
	if c.f, err = os.Open(plain); err != nil {
		return nil, err
	}
	var src io.Reader = bufio.NewReaderSize(c.f, 1<<16)
	if strings.HasSuffix(c.name, ".gz") {
		if c.gz, err = gzip.NewReader(src); err != nil {
			c.f.Close()
			return nil, &ParseError{File: c.name, Err: err}
		}
		src = bufio.NewReaderSize(c.gz, 1<<16)
	}
	c.r = csv.NewReader(src)
	c.r.ReuseRecord = true
	header, err := c.r.Read()
	if err != nil {
		c.close()
		if err == io.EOF {
			err = errors.New("empty file: no header line")
		}
		return nil, &ParseError{File: c.name, Line: 1, Err: err}
	}
	c.header = slices.Clone(header)
	c.header[0] = strings.TrimPrefix(c.header[0], "\ufeff")
	c.col = make(map[string]int, len(c.header))
	for i, name := range c.header {
		if name == "" {
			c.close()
			return nil, &ParseError{File: c.name, Line: 1, Err: fmt.Errorf("column %d has no name", i+1)}
		}
		if _, dup := c.col[name]; dup {
			c.close()
			return nil, &ParseError{File: c.name, Line: 1, Err: fmt.Errorf("column %q appears twice", name)}
		}
		c.col[name] = i
	}
	return c, nil
}

func (c *csvFile) close() {
	if c.gz != nil {
		c.gz.Close()
	}
	c.f.Close()
}

// require returns the indexes of the named columns, or an error naming the
// first missing one.
func (c *csvFile) require(names ...string) ([]int, error) {
	idx := make([]int, len(names))
	for i, n := range names {
		j, ok := c.col[n]
		if !ok {
			return nil, &ParseError{File: c.name, Line: 1, Err: fmt.Errorf("missing required column %q", n)}
		}
		idx[i] = j
	}
	return idx, nil
}

// next reads the next record. It returns nil at the end of the file.
func (c *csvFile) next() ([]string, error) {
	rec, err := c.r.Read()
	if err == io.EOF {
		return nil, nil
	}
	if err != nil {
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			return nil, &ParseError{File: c.name, Line: pe.Line, Err: pe.Err}
		}
		return nil, &ParseError{File: c.name, Err: err}
	}
	return rec, nil
}

// cellError reports a bad cell of the record just read.
func (c *csvFile) cellError(col int, err error) error {
	line, _ := c.r.FieldPos(col)
	return &ParseError{File: c.name, Line: line, Column: c.header[col], Err: err}
}

// line returns the line of the record just read.
func (c *csvFile) line() int {
	line, _ := c.r.FieldPos(0)
	return line
}

// site resolves the site cell of the record just read.
func (p *parser) site(c *csvFile, rec []string, col int) (int, error) {
	i, ok := p.index[rec[col]]
	if !ok {
		return 0, c.cellError(col, fmt.Errorf("unknown site %q (not in %s)", rec[col], SitesFile))
	}
	return i, nil
}

// timeCache parses one time column, remembering the last value: history
// files repeat issue and interval times on consecutive rows.
type timeCache struct {
	s string
	t time.Time
}

func (tc *timeCache) parse(s string) (time.Time, error) {
	if s == tc.s && s != "" {
		return tc.t, nil
	}
	t, err := parseTime(s)
	if err != nil {
		return time.Time{}, err
	}
	tc.s, tc.t = s, t // s keeps one line of the file alive, no more
	return t, nil
}

// parseTime parses an RFC 3339 time and returns it in UTC. The fixed layout
// "2006-01-02T15:04:05Z" takes a fast path.
func parseTime(s string) (time.Time, error) {
	if len(s) == 20 && s[4] == '-' && s[7] == '-' && s[10] == 'T' && s[13] == ':' && s[16] == ':' && s[19] == 'Z' {
		y, ok1 := digits(s[0:4])
		mo, ok2 := digits(s[5:7])
		d, ok3 := digits(s[8:10])
		hh, ok4 := digits(s[11:13])
		mm, ok5 := digits(s[14:16])
		ss, ok6 := digits(s[17:19])
		// Days past the 28th go the slow way, which knows month lengths.
		if ok1 && ok2 && ok3 && ok4 && ok5 && ok6 && mo >= 1 && mo <= 12 && d >= 1 && d <= 28 && hh < 24 && mm < 60 && ss < 60 {
			return time.Date(y, time.Month(mo), d, hh, mm, ss, 0, time.UTC), nil
		}
	}
	t, err := time.Parse(time.RFC3339, s)
	if err != nil {
		return time.Time{}, err
	}
	return t.UTC(), nil
}

func digits(s string) (int, bool) {
	n := 0
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c < '0' || c > '9' {
			return 0, false
		}
		n = n*10 + int(c-'0')
	}
	return n, true
}

// parseMinutes parses a positive whole number of minutes.
func parseMinutes(s string) (int, error) {
	n, err := strconv.Atoi(s)
	if err != nil {
		return 0, err
	}
	if n <= 0 {
		return 0, fmt.Errorf("%d minutes: must be positive", n)
	}
	return n, nil
}

// parseValue parses a numeric cell; empty is NaN (a missing value).
func parseValue(s string) (float64, error) {
	if s == "" {
		return math.NaN(), nil
	}
	v, err := strconv.ParseFloat(s, 64)
	if err != nil {
		return 0, err
	}
	if !model.Finite(v) {
		return 0, fmt.Errorf("value %q is not finite (leave the cell empty for a missing value)", s)
	}
	return v, nil
}

// instant is a time as comparable integers, valid for every year.
type instant struct {
	sec  int64
	nsec int32
}

func instantOf(t time.Time) instant { return instant{t.Unix(), int32(t.Nanosecond())} }

func (a instant) compare(b instant) int {
	if c := cmp.Compare(a.sec, b.sec); c != 0 {
		return c
	}
	return cmp.Compare(a.nsec, b.nsec)
}

type runKey struct {
	site   int
	issued instant
}

type runBuild struct {
	run   model.WeatherRun
	lines []int32 // file line of each row
}

func (p *parser) loadWeather(dir string) ([]model.WeatherRun, error) {
	c, err := openCSV(dir, WeatherFile)
	if err != nil {
		return nil, err
	}
	defer c.close()
	req, err := c.require("site", "issued_at", "valid_start", "valid_minutes")
	if err != nil {
		return nil, err
	}
	cSite, cIssued, cStart, cMinutes := req[0], req[1], req[2], req[3]
	// Variables: every other column, in sorted order.
	var vars []string
	for i, name := range c.header {
		if !slices.Contains(req, i) {
			vars = append(vars, name)
		}
	}
	slices.Sort(vars)
	varCol := make([]int, len(vars))
	for j, v := range vars {
		varCol[j] = c.col[v]
	}

	var (
		runs              = make(map[runKey]*runBuild)
		order             []*runBuild
		issuedTC, startTC timeCache
		slab              []float64
		last              *runBuild
		lastKey           runKey
	)
	for {
		rec, err := c.next()
		if err != nil {
			return nil, err
		}
		if rec == nil {
			break
		}
		si, err := p.site(c, rec, cSite)
		if err != nil {
			return nil, err
		}
		issued, err := issuedTC.parse(rec[cIssued])
		if err != nil {
			return nil, c.cellError(cIssued, err)
		}
		start, err := startTC.parse(rec[cStart])
		if err != nil {
			return nil, c.cellError(cStart, err)
		}
		minutes, err := parseMinutes(rec[cMinutes])
		if err != nil {
			return nil, c.cellError(cMinutes, err)
		}
		if len(slab) < len(vars) {
			slab = make([]float64, 4096*max(len(vars), 1))
		}
		values := slab[:len(vars):len(vars)]
		for j, col := range varCol {
			v, err := parseValue(rec[col])
			if err != nil {
				return nil, c.cellError(col, err)
			}
			values[j] = v
		}
		if !p.selected[si] || !p.opts.inWindow(issued) {
			continue
		}
		slab = slab[len(vars):]
		key := runKey{si, instantOf(issued)}
		b := last
		if b == nil || key != lastKey {
			b = runs[key]
			if b == nil {
				b = &runBuild{run: model.WeatherRun{
					Site:     p.sites[si].ID,
					IssuedAt: issued,
					Vars:     slices.Clone(vars),
				}}
				runs[key] = b
				order = append(order, b)
			}
			last, lastKey = b, key
		}
		b.run.Rows = append(b.run.Rows, model.WeatherRow{ValidStart: start, ValidMinutes: minutes, Values: values})
		b.lines = append(b.lines, int32(c.line()))
	}

	out := make([]model.WeatherRun, len(order))
	for i, b := range order {
		if err := b.check(c, cStart); err != nil {
			return nil, err
		}
		out[i] = b.run
	}
	slices.SortFunc(out, compareRuns)
	return out, nil
}

// check sorts the run's rows by ValidStart and rejects overlapping rows.
func (b *runBuild) check(c *csvFile, cStart int) error {
	rows := b.run.Rows
	if !slices.IsSortedFunc(rows, compareRows) {
		perm := make([]int, len(rows))
		for i := range perm {
			perm[i] = i
		}
		slices.SortStableFunc(perm, func(i, j int) int { return compareRows(rows[i], rows[j]) })
		sorted := make([]model.WeatherRow, len(rows))
		lines := make([]int32, len(rows))
		for i, k := range perm {
			sorted[i], lines[i] = rows[k], b.lines[k]
		}
		b.run.Rows, b.lines, rows = sorted, lines, sorted
	}
	for i := 1; i < len(rows); i++ {
		if rows[i].ValidStart.Before(rows[i-1].End()) {
			what := "overlaps"
			if rows[i].ValidStart.Equal(rows[i-1].ValidStart) {
				what = "repeats"
			}
			first, second := b.lines[i-1], b.lines[i]
			if second < first {
				first, second = second, first
			}
			return &ParseError{File: c.name, Line: int(second), Column: c.header[cStart],
				Err: fmt.Errorf("run of site %s issued %s: row %s the valid interval of line %d",
					b.run.Site, b.run.IssuedAt.Format(time.RFC3339), what, first)}
		}
	}
	return nil
}

// meter columns beyond the required ones.
const (
	colAvailability = "availability"
	colCurtailed    = "curtailed"
)

// readingKey sorts readings cheaply: (end, site rank, start) as integers,
// then the file line.
type readingKey struct {
	end, start instant
	site, line int32
	idx        int32
}

func (p *parser) loadMeter(dir string) ([]model.Reading, error) {
	c, err := openCSV(dir, MeterFile)
	if err != nil {
		return nil, err
	}
	defer c.close()
	req, err := c.require("site", "interval_start", "interval_minutes", "power_mw")
	if err != nil {
		return nil, err
	}
	cSite, cStart, cMinutes, cPower := req[0], req[1], req[2], req[3]
	cAvail, cCurt := -1, -1
	for i, name := range c.header {
		switch {
		case slices.Contains(req, i):
		case name == colAvailability:
			cAvail = i
		case name == colCurtailed:
			cCurt = i
		default:
			return nil, &ParseError{File: c.name, Line: 1, Err: fmt.Errorf("unknown column %q (meter columns: site, interval_start, interval_minutes, power_mw, availability, curtailed)", name)}
		}
	}

	// rank orders the sites by id, so that sorting on rank sorts on id.
	rank := make([]int32, len(p.sites))
	byID := make([]int, len(p.sites))
	for i := range byID {
		byID[i] = i
	}
	slices.SortFunc(byID, func(a, b int) int { return strings.Compare(p.sites[a].ID, p.sites[b].ID) })
	for r, i := range byID {
		rank[i] = int32(r)
	}
	var (
		rs      []model.Reading
		keys    []readingKey
		startTC timeCache
	)
	for {
		rec, err := c.next()
		if err != nil {
			return nil, err
		}
		if rec == nil {
			break
		}
		si, err := p.site(c, rec, cSite)
		if err != nil {
			return nil, err
		}
		start, err := startTC.parse(rec[cStart])
		if err != nil {
			return nil, c.cellError(cStart, err)
		}
		minutes, err := parseMinutes(rec[cMinutes])
		if err != nil {
			return nil, c.cellError(cMinutes, err)
		}
		power, err := parseValue(rec[cPower])
		if err != nil {
			return nil, c.cellError(cPower, err)
		}
		r := model.Reading{Site: p.sites[si].ID, IntervalStart: start, IntervalMinutes: minutes, PowerMW: power, Availability: 1}
		if cAvail >= 0 && rec[cAvail] != "" {
			a, err := parseValue(rec[cAvail])
			if err == nil && (a < 0 || a > 1) {
				err = fmt.Errorf("%v is outside [0, 1]", a)
			}
			if err != nil {
				return nil, c.cellError(cAvail, err)
			}
			r.Availability = a
		}
		if cCurt >= 0 && rec[cCurt] != "" {
			if r.Curtailed, err = strconv.ParseBool(rec[cCurt]); err != nil {
				return nil, c.cellError(cCurt, err)
			}
		}
		if !p.selected[si] || !p.opts.inWindow(r.End()) {
			continue
		}
		keys = append(keys, readingKey{
			end: instantOf(r.End()), start: instantOf(start),
			site: rank[si], line: int32(c.line()), idx: int32(len(rs)),
		})
		rs = append(rs, r)
	}

	slices.SortFunc(keys, func(a, b readingKey) int {
		if c := a.end.compare(b.end); c != 0 {
			return c
		}
		if c := cmp.Compare(a.site, b.site); c != 0 {
			return c
		}
		if c := a.start.compare(b.start); c != 0 {
			return c
		}
		return cmp.Compare(a.line, b.line)
	})
	out := make([]model.Reading, len(rs))
	for i, k := range keys {
		out[i] = rs[k.idx]
		if i > 0 {
			if a := keys[i-1]; a.end == k.end && a.site == k.site && a.start == k.start {
				return nil, &ParseError{File: c.name, Line: int(k.line), Column: c.header[cStart],
					Err: fmt.Errorf("site %s: second reading of the interval at %s (first on line %d)",
						out[i].Site, out[i].IntervalStart.Format(time.RFC3339), a.line)}
			}
		}
	}
	return out, nil
}
