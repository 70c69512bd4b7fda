package backtest

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"io"
	"math"
	"reflect"
	"strconv"
	"strings"
	"time"
)

// WriteJSON writes r as indented JSON (two-space indent, one trailing
// newline): the report.json of a backtest. JSON cannot hold NaN or an
// infinity, so WriteJSON first checks every number of r and refuses one
// that is not finite with an error naming its field (e.g.
// "variants[0].intraday.all.pinball is NaN"); nothing is written then.
func WriteJSON(w io.Writer, r *Report) error {
	if r == nil {
		return errors.New("backtest: write json: nil report")
	}
	if err := jsonCheckFinite(reflect.ValueOf(r).Elem(), ""); err != nil {
		return fmt.Errorf("backtest: write json: %w", err)
	}
	b, err := json.MarshalIndent(r, "", "  ")
	if err != nil {
		return fmt.Errorf("backtest: write json: %w", err)
	}
	if _, err := w.Write(append(b, '\n')); err != nil {
		return fmt.Errorf("backtest: write json: %w", err)
	}
	return nil
}

// jsonCheckFinite returns an error naming the first float under v (by its
// JSON path) that is NaN or infinite.
func jsonCheckFinite(v reflect.Value, path string) error {
	switch v.Kind() {
	case reflect.Float32, reflect.Float64:
		if f := v.Float(); math.IsNaN(f) || math.IsInf(f, 0) {
			return fmt.Errorf("%s is %v, which JSON cannot hold", path, f)
		}
	case reflect.Pointer, reflect.Interface:
		if !v.IsNil() {
			return jsonCheckFinite(v.Elem(), path)
		}
	case reflect.Slice, reflect.Array:
		for i := range v.Len() {
			if err := jsonCheckFinite(v.Index(i), fmt.Sprintf("%s[%d]", path, i)); err != nil {
				return err
			}
		}
	case reflect.Map:
		iter := v.MapRange()
		for iter.Next() {
			if err := jsonCheckFinite(iter.Value(), fmt.Sprintf("%s[%v]", path, iter.Key())); err != nil {
				return err
			}
		}
	case reflect.Struct:
		if v.Type() == reflect.TypeFor[time.Time]() {
			return nil
		}
		t := v.Type()
		for i := range t.NumField() {
			f := t.Field(i)
			if !f.IsExported() {
				continue
			}
			name, _, _ := strings.Cut(f.Tag.Get("json"), ",")
			if name == "-" {
				continue
			}
			if name == "" {
				name = f.Name
			}
			if path != "" {
				name = path + "." + name
			}
			if err := jsonCheckFinite(v.Field(i), name); err != nil {
				return err
			}
		}
	}
	return nil
}

// htmlCaution is the caution printed at the top of every report.
const htmlCaution = "Forecasts feed trading and dispatch decisions; this report supports, and does not replace, the responsible party's judgement; follow market rules and grid codes."

// The section headings of report.html, in page order.
const (
	htmlHeadCompare     = "Comparison of variants"
	htmlHeadReliability = "Reliability diagrams"
	htmlHeadPIT         = "PIT histogram"
	htmlHeadWeekly      = "Coverage over time"
	htmlHeadWidth       = "Interval width by lead"
	htmlHeadFan         = "Fan chart"
	htmlHeadSites       = "Scores by site"
	htmlHeadLeads       = "Scores by lead"
	htmlHeadAlarms      = "Alarms raised"
	htmlHeadRead        = "How to read this"
)

// htmlPValue is the p-value under which a coverage test is flagged.
const htmlPValue = 0.05

// WriteHTML writes r as one self-contained HTML page (inline CSS and SVG
// plots, nothing fetched from elsewhere): the report.html of a backtest,
// for the people deciding whether a forecast set-up may go live. Missing
// pieces (no fan, a view with N = 0, one variant, no 80 % pair of levels,
// short slices, non-finite numbers) are shown as gaps or notes, never as a
// failure. The page is a deterministic function of r. The page is built in
// memory and written only when complete.
func WriteHTML(w io.Writer, r *Report) error {
	if r == nil {
		return errors.New("backtest: write html: nil report")
	}
	page, err := htmlBuildPage(r)
	if err != nil {
		return fmt.Errorf("backtest: write html: %w", err)
	}
	tmpl, err := template.New("report").Parse(htmlTemplate)
	if err != nil {
		return fmt.Errorf("backtest: write html: parse template: %w", err)
	}
	var buf bytes.Buffer
	if err := tmpl.Execute(&buf, page); err != nil {
		return fmt.Errorf("backtest: write html: %w", err)
	}
	if _, err := buf.WriteTo(w); err != nil {
		return fmt.Errorf("backtest: write html: %w", err)
	}
	return nil
}

// htmlPage is what the template draws.
type htmlPage struct {
	Title    string
	Caution  template.HTML
	Facts    []htmlFact
	Heads    map[string]string
	Variants []htmlVariantLine

	DayAheadLabel string
	Compare       htmlTable

	Reliability []htmlFigure
	PIT         htmlFigure
	Weekly      htmlFigure
	Width       htmlFigure
	Fan         htmlFigure

	Sites    []htmlTable
	SiteNote string
	Leads    htmlTable
	Alarms   htmlTable
	Schema   int
}

// htmlFact is one line of the header.
type htmlFact struct {
	Name, Value, Note string
}

// htmlVariantLine describes one variant in the header.
type htmlVariantLine struct {
	Name, Role, Model, Calibrator string
}

// htmlFigure is a drawn plot or a note saying why there is none.
type htmlFigure struct {
	SVG     template.HTML
	Note    string
	Caption string
}

// htmlTable is a table with one or two header rows.
type htmlTable struct {
	Caption string
	Groups  []htmlGroup // optional upper header row
	Header  []string
	Rows    []htmlRow
	Note    string
}

// htmlGroup is a header cell spanning Span columns.
type htmlGroup struct {
	Text string
	Span int
}

// htmlRow is one table row.
type htmlRow struct {
	Class string
	Cells []htmlCell
}

// htmlCell is one table cell; Span > 1 spans rows, Span < 0 means the cell
// is covered by a row span above and not drawn.
type htmlCell struct {
	Text  string
	Tag   string // a small label after the text, e.g. "main"
	Class string
	Span  int
	Head  bool
}

// htmlBuildPage computes the page of r.
func htmlBuildPage(r *Report) (*htmlPage, error) {
	pg := &htmlPage{
		Title:   "plumb backtest report",
		Caution: template.HTML(htmlCaution), // a constant of this package
		Schema:  r.Schema,
		Heads: map[string]string{
			"compare": htmlHeadCompare, "reliability": htmlHeadReliability, "pit": htmlHeadPIT,
			"weekly": htmlHeadWeekly, "width": htmlHeadWidth, "fan": htmlHeadFan,
			"sites": htmlHeadSites, "leads": htmlHeadLeads, "alarms": htmlHeadAlarms, "read": htmlHeadRead,
		},
		DayAheadLabel: "Day-ahead (" + r.ViewLabel() + ")",
	}
	pg.Facts = htmlFacts(r)
	for i, v := range r.Variants {
		role := ""
		switch {
		case i == 0:
			role = "main"
		case v.Reference:
			role = "reference"
		}
		pg.Variants = append(pg.Variants, htmlVariantLine{Name: v.Name, Role: role, Model: v.Model, Calibrator: v.Calibrator})
	}
	pg.Compare = htmlCompare(r)
	pg.Alarms = htmlAlarms(r)

	var err error
	draw := func(fig *svgFigure, note, label, caption string) htmlFigure {
		if fig == nil || err != nil {
			return htmlFigure{Note: note, Caption: caption}
		}
		svg, e := fig.svg(label)
		if e != nil {
			err = e
		}
		return htmlFigure{SVG: svg, Caption: caption}
	}
	fig, note := svgReliability(r, false)
	pg.Reliability = append(pg.Reliability, draw(fig, note, "reliability diagram, intraday",
		"Intraday view: every forecast issued, all sites and leads pooled."))
	fig, note = svgReliability(r, true)
	pg.Reliability = append(pg.Reliability, draw(fig, note, "reliability diagram, day-ahead",
		"Day-ahead view: forecasts "+r.ViewLabel()+"."))
	fig, note = svgPIT(r)
	pg.PIT = draw(fig, note, "PIT histogram",
		"Each bar is the share of outcomes that fell between two consecutive levels, divided by the gap between them; a calibrated forecast gives the flat line at 1. A U shape means too narrow, a hump too wide, a slope a bias.")
	fig, note = svgWeekly(r)
	pg.Weekly = draw(fig, note, "coverage over time",
		"Observed coverage per calendar week (Monday to Sunday, UTC) of the main variant, intraday. Dashed: the target; shaded: ±2 binomial standard errors, sqrt(τ(1−τ)/N) with that week's N; outcomes of one week are not independent, so read the band as a rough guide.")
	fig, note = svgWidthByLead(r)
	pg.Width = draw(fig, note, "interval width by lead",
		"Sharpness: narrower is better only where coverage holds (see the tables below).")
	fig, note = svgFan(r)
	fanCaption := "Shaded: central intervals; line: the median; dots: observed outcomes."
	if len(r.Variants) > 0 && r.Variants[0].Fan != nil {
		fanCaption = fmt.Sprintf("Day-ahead forecasts (%s) of site %s. %s", r.ViewLabel(), r.Variants[0].Fan.Site, fanCaption)
	}
	pg.Fan = draw(fig, note, "fan chart", fanCaption)
	if err != nil {
		return nil, err
	}

	pg.Sites, pg.SiteNote = htmlSites(r)
	pg.Leads = htmlLeads(r)
	return pg, nil
}

// htmlFacts is the header of the report.
func htmlFacts(r *Report) []htmlFact {
	var f []htmlFact
	data := r.Data
	if data == "" {
		data = "not recorded"
	}
	f = append(f, htmlFact{Name: "Data folder", Value: data})
	period := "not recorded"
	if !r.From.IsZero() && !r.To.IsZero() {
		period = fmt.Sprintf("delivery intervals starting from %s up to (not including) %s: %s days",
			htmlTime(r.From), htmlTime(r.To), svgTrim(math.Round(r.To.Sub(r.From).Hours()/24*10)/10))
	}
	f = append(f, htmlFact{Name: "Scored period", Value: period})
	sites := fmt.Sprintf("%d: %s", len(r.Sites), strings.Join(r.Sites, ", "))
	if len(r.Sites) > 30 {
		sites = fmt.Sprintf("%d: %s and %d more", len(r.Sites), strings.Join(r.Sites[:30], ", "), len(r.Sites)-30)
	}
	if len(r.Sites) == 0 {
		sites = "none"
	}
	f = append(f, htmlFact{Name: "Sites", Value: sites})
	f = append(f, htmlFact{Name: "Levels", Value: htmlLevels(r.Levels)})
	if len(r.Buckets) > 0 {
		f = append(f, htmlFact{Name: "Lead buckets", Value: strings.Join(r.Buckets, ", ")})
	}
	f = append(f, htmlFact{Name: "Day-ahead view", Value: "forecasts " + r.ViewLabel()})
	f = append(f, htmlFact{Name: "Intraday view", Value: "every forecast issued, all leads"})
	c := r.Costs
	cur := htmlCurrency(c.Currency)
	price := func(x float64) string {
		if !svgFinite(x) {
			return "–"
		}
		return svgTrim(math.Round(x*100) / 100)
	}
	costs := fmt.Sprintf("short %s %s/MWh, long %s %s/MWh; cost-optimal bid at level %s (long / (short + long))",
		price(c.Short), cur, price(c.Long), cur, htmlLevel(c.CriticalLevel))
	note := "Given by the user."
	if htmlIllustrative(c) {
		note = "Illustrative defaults, not market prices: rerun with your own imbalance prices before reading the trading figures."
	}
	f = append(f, htmlFact{Name: "Imbalance costs", Value: costs, Note: note})
	f = append(f, htmlFact{Name: "Inputs refused", Value: strconv.Itoa(r.Refused), Note: "late, duplicate or too far ahead, by the main variant's actors; a clean history gives 0"})
	return f
}

// htmlIllustrative reports whether c are the backtest's illustrative
// default costs rather than the user's.
func htmlIllustrative(c Costs) bool { return c.Illustrative }

// htmlCurrency is the currency to print beside amounts.
func htmlCurrency(c string) string {
	c = strings.TrimSpace(c)
	if c == "" {
		return "money units"
	}
	return c
}

// htmlTime formats an instant in UTC.
func htmlTime(t time.Time) string { return t.UTC().Format("2006-01-02 15:04 UTC") }

// htmlLevel formats a level, e.g. "0.05"; "–" when not finite.
func htmlLevel(l float64) string {
	if !svgFinite(l) {
		return "–"
	}
	return strconv.FormatFloat(math.Round(l*1e9)/1e9, 'f', -1, 64)
}

// htmlLevels summarises the level grid.
func htmlLevels(ls []float64) string {
	switch {
	case len(ls) == 0:
		return "none"
	case len(ls) == 1:
		return "1 level: " + htmlLevel(ls[0])
	}
	step := ls[1] - ls[0]
	even := svgFinite(step) && step > 0
	for i := 2; i < len(ls) && even; i++ {
		even = math.Abs(ls[i]-ls[i-1]-step) < 1e-9
	}
	if even {
		return fmt.Sprintf("%d levels, %s to %s in steps of %s", len(ls), htmlLevel(ls[0]), htmlLevel(ls[len(ls)-1]), htmlLevel(step))
	}
	if len(ls) <= 20 {
		s := make([]string, len(ls))
		for i, l := range ls {
			s[i] = htmlLevel(l)
		}
		return fmt.Sprintf("%d levels: %s", len(ls), strings.Join(s, ", "))
	}
	return fmt.Sprintf("%d levels, %s to %s", len(ls), htmlLevel(ls[0]), htmlLevel(ls[len(ls)-1]))
}

// htmlNum formats a quantity with decimals fitting its size; "–" when not
// finite.
func htmlNum(x float64) string {
	if !svgFinite(x) {
		return "–"
	}
	a := math.Abs(x)
	switch {
	case a >= 1000:
		return htmlGroup3(fmt.Sprintf("%.0f", x))
	case a >= 100:
		return fmt.Sprintf("%.0f", x)
	case a >= 10:
		return fmt.Sprintf("%.1f", x)
	case a >= 1:
		return fmt.Sprintf("%.2f", x)
	}
	return fmt.Sprintf("%.3f", x)
}

// htmlInt formats a count with thousands separated.
func htmlInt(n int) string { return htmlGroup3(strconv.Itoa(n)) }

// htmlGroup3 separates the thousands of an integer numeral with narrow
// no-break spaces.
func htmlGroup3(s string) string {
	sign := ""
	if strings.HasPrefix(s, "-") {
		sign, s = "-", s[1:]
	}
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteRune('\u202f')
		}
		b.WriteRune(c)
	}
	return sign + b.String()
}

// htmlPct formats a share as a percentage with one decimal.
func htmlPct(x float64) string {
	if !svgFinite(x) {
		return "–"
	}
	return fmt.Sprintf("%.1f\u00a0%%", 100*x)
}

// htmlSigned formats a share as a signed percentage (skill, saving).
func htmlSigned(x float64) string {
	if !svgFinite(x) {
		return "–"
	}
	return fmt.Sprintf("%+.1f\u00a0%%", 100*x)
}

// htmlP formats a p-value, flagged when under htmlPValue.
func htmlP(s []float64, i int) htmlCell {
	p, ok := svgAt(s, i)
	if !ok {
		return htmlCell{Text: "–", Class: "num"}
	}
	c := htmlCell{Text: fmt.Sprintf("%.3f", p), Class: "num"}
	if p < 0.001 {
		c.Text = "<0.001"
	}
	if p < htmlPValue {
		c.Text += " *"
		c.Class = "num flag"
	}
	return c
}

// htmlCompareCol is a column of the comparison table, repeated per view:
// the header, the value, its format and how "best" is decided (+1 highest,
// -1 lowest, a target in (0, 1) closest to it, 0 not ranked).
type htmlCompareCol struct {
	head  string
	value func(s Scores) (float64, bool)
	text  func(x float64) string
	rank  float64
}

// htmlCompareCols lists the columns of one view.
func htmlCompareCols() []htmlCompareCol {
	iv := func(nom float64, field func(Interval) float64) func(Scores) (float64, bool) {
		return func(s Scores) (float64, bool) {
			x, ok := svgInterval(s, nom)
			return field(x), ok && svgFinite(field(x))
		}
	}
	fin := func(f func(Scores) float64) func(Scores) (float64, bool) {
		return func(s Scores) (float64, bool) { return f(s), svgFinite(f(s)) }
	}
	cov := func(x Interval) float64 { return x.Coverage }
	return []htmlCompareCol{
		{"N", func(s Scores) (float64, bool) { return float64(s.N), true }, func(x float64) string { return htmlInt(int(x)) }, 0},
		{"Pinball (MW)", fin(func(s Scores) float64 { return s.Pinball }), htmlNum, -1},
		{"CRPS (MW)", fin(func(s Scores) float64 { return s.CRPS }), htmlNum, -1},
		{"Skill vs clim.", fin(func(s Scores) float64 { return s.Skill }), htmlSigned, +1},
		{"Cov. 80\u00a0% int.", iv(0.8, cov), htmlPct, 0.8},
		{"Cov. 90\u00a0% int.", iv(0.9, cov), htmlPct, 0.9},
		{"IS 90\u00a0% (MW)", iv(0.9, func(x Interval) float64 { return x.Score }), htmlNum, -1},
	}
}

// htmlBest marks the best values of a column: vals[i] is row i's value,
// ok[i] whether it competes, rank as in htmlCompareCol. Ties are all marked;
// nothing is marked with fewer than two competitors.
func htmlBest(vals []float64, ok []bool, rank float64) []bool {
	best := make([]bool, len(vals))
	if rank == 0 {
		return best
	}
	score := func(x float64) float64 {
		switch {
		case rank > 0 && rank < 1:
			return math.Abs(x - rank)
		case rank > 0:
			return -x
		}
		return x
	}
	n, top := 0, math.Inf(1)
	for i, x := range vals {
		if ok[i] {
			n++
			top = math.Min(top, score(x))
		}
	}
	if n < 2 {
		return best
	}
	for i, x := range vals {
		best[i] = ok[i] && score(x) == top
	}
	return best
}

// htmlCompare is the comparison table: one row per variant, the day-ahead
// and the intraday columns side by side, best values marked.
func htmlCompare(r *Report) htmlTable {
	cols := htmlCompareCols()
	t := htmlTable{
		Groups: []htmlGroup{{Text: "", Span: 1},
			{Text: "Day-ahead (" + r.ViewLabel() + ")", Span: len(cols)},
			{Text: "Intraday (every forecast)", Span: len(cols)}},
		Header: []string{"Variant"},
		Note:   "Bold and shaded: the best value of each column among variants with scored forecasts (lowest loss, highest skill, coverage closest to its target). Cov.: share of outcomes inside the central interval; IS: mean interval score.",
	}
	for range 2 {
		for _, c := range cols {
			t.Header = append(t.Header, c.head)
		}
	}
	if len(r.Variants) == 0 {
		t.Note = "No variant was scored."
		return t
	}
	t.Rows = make([]htmlRow, len(r.Variants))
	for i, v := range r.Variants {
		cell := htmlCell{Text: v.Name, Class: "name", Head: true}
		row := htmlRow{}
		switch {
		case i == 0:
			cell.Tag, row.Class = "main", "main"
		case v.Reference:
			cell.Tag, row.Class = "reference", "ref"
		}
		row.Cells = append(row.Cells, cell)
		t.Rows[i] = row
	}
	for k := range 2 {
		for _, c := range cols {
			vals := make([]float64, len(r.Variants))
			ok := make([]bool, len(r.Variants))
			for i := range r.Variants {
				s := r.Variants[i].DayAhead.All
				if k == 1 {
					s = r.Variants[i].Intraday.All
				}
				vals[i], ok[i] = c.value(s)
				if c.rank != 0 && s.N <= 0 {
					ok[i] = false
				}
			}
			best := htmlBest(vals, ok, c.rank)
			// A value printed like the best one is marked too: equal
			// figures must look equal.
			bestText := map[string]bool{}
			for i := range best {
				if best[i] {
					bestText[c.text(vals[i])] = true
				}
			}
			for i := range r.Variants {
				cell := htmlCell{Text: "–", Class: "num"}
				if ok[i] {
					cell.Text = c.text(vals[i])
				}
				if ok[i] && bestText[cell.Text] {
					cell.Class = "num best"
				}
				t.Rows[i].Cells = append(t.Rows[i].Cells, cell)
			}
		}
	}
	return t
}

// htmlSiteOf returns the scores of site in v, if any.
func htmlSiteOf(v View, site string) (SiteScores, bool) {
	for _, s := range v.BySite {
		if s.Site == site {
			return s, true
		}
	}
	return SiteScores{}, false
}

// htmlSites is one table per variant: each site's scores, coverage tests
// and trading value in both views.
func htmlSites(r *Report) ([]htmlTable, string) {
	if len(r.Variants) == 0 {
		return nil, "No variant was scored."
	}
	sites := append([]string(nil), r.Sites...)
	seen := map[string]bool{}
	for _, s := range sites {
		seen[s] = true
	}
	for _, v := range r.Variants {
		for _, view := range []View{v.DayAhead, v.Intraday} {
			for _, s := range view.BySite {
				if !seen[s.Site] {
					seen[s.Site] = true
					sites = append(sites, s.Site)
				}
			}
		}
	}
	if len(sites) == 0 {
		return nil, "The report lists no sites."
	}
	lv := svgLevelsNear(r.Levels, 0.1, 0.5, 0.9)
	tests := svgLevelsNear(r.Levels, 0.1, 0.9)
	cur := htmlCurrency(r.Costs.Currency)
	header := []string{"Site", "View", "N", "Pinball (MW)"}
	for _, i := range lv {
		header = append(header, "Cov. "+svgLevelLabel(r.Levels[i]))
	}
	for _, i := range tests {
		header = append(header, "Kupiec p "+svgLevelLabel(r.Levels[i]))
	}
	for _, i := range tests {
		header = append(header, "Christoffersen p "+svgLevelLabel(r.Levels[i]))
	}
	header = append(header, "Cost, median bid ("+cur+")",
		"Cost, bid at level "+htmlLevel(r.Costs.CriticalLevel)+" ("+cur+")", "Saving")
	var out []htmlTable
	for vi, v := range r.Variants {
		caption := v.Name
		switch {
		case vi == 0:
			caption += " (main)"
		case v.Reference:
			caption += " (reference)"
		}
		t := htmlTable{Caption: caption, Header: header}
		for _, site := range sites {
			for k, view := range []View{v.DayAhead, v.Intraday} {
				row := htmlRow{}
				if k == 0 {
					row.Cells = append(row.Cells, htmlCell{Text: site, Class: "name", Span: 2, Head: true})
				} else {
					row.Cells = append(row.Cells, htmlCell{Span: -1})
				}
				row.Cells = append(row.Cells, htmlCell{Text: []string{"day-ahead", "intraday"}[k]})
				ss, ok := htmlSiteOf(view, site)
				n := ss.Scores.N
				row.Cells = append(row.Cells, htmlCell{Text: htmlInt(n), Class: "num"})
				dash := func(s string) htmlCell {
					if !ok || n <= 0 {
						return htmlCell{Text: "–", Class: "num"}
					}
					return htmlCell{Text: s, Class: "num"}
				}
				row.Cells = append(row.Cells, dash(htmlNum(ss.Scores.Pinball)))
				for _, i := range lv {
					c, has := svgAt(ss.Scores.Coverage, i)
					if !has {
						c = math.NaN()
					}
					row.Cells = append(row.Cells, dash(htmlPct(c)))
				}
				for _, ps := range [][]float64{ss.Scores.KupiecP, ss.Scores.ChristoffersenP} {
					for _, i := range tests {
						if !ok || n <= 0 {
							row.Cells = append(row.Cells, dash(""))
							continue
						}
						row.Cells = append(row.Cells, htmlP(ps, i))
					}
				}
				tr := ss.Trading
				row.Cells = append(row.Cells, dash(htmlNum(tr.CostMedian)), dash(htmlNum(tr.CostOptimal)), dash(htmlSigned(tr.Saving)))
				t.Rows = append(t.Rows, row)
			}
		}
		out = append(out, t)
	}
	note := fmt.Sprintf("Cov.: share of outcomes at or below the quantile of that level (target: the level). "+
		"Kupiec tests that share; Christoffersen tests that misses do not cluster in time. "+
		"* marks p < %s: the test rejects calibration at the 5\u00a0%% level. "+
		"Trading: expected imbalance cost of bidding the median against bidding the quantile at the cost-optimal level; saving = 1 − optimal / median.",
		svgTrim(htmlPValue))
	return out, note
}

// htmlLeads is the per-lead-bucket table of the main variant's intraday
// view.
// htmlAlarms tables the alarms each calibrated variant raised while scored
// forecasts were issued (one alarm per site and kind: raised by its first lead bucket and level off, cleared by its last).
func htmlAlarms(r *Report) htmlTable {
	t := htmlTable{Header: []string{"Variant", "Site", "Kind", "Raised", "First raised (UTC)"}}
	for _, v := range r.Variants {
		if v.Reference {
			continue
		}
		for _, a := range v.Alarms {
			t.Rows = append(t.Rows, htmlRow{Cells: []htmlCell{
				{Text: v.Name, Class: "name", Head: true}, {Text: a.Site}, {Text: a.Kind},
				{Text: htmlInt(a.Raised), Class: "num"}, {Text: a.First.UTC().Format("2006-01-02 15:04")},
			}})
		}
	}
	if len(t.Rows) == 0 {
		t.Note = "No alarm was raised."
	}
	return t
}

func htmlLeads(r *Report) htmlTable {
	t := htmlTable{}
	if len(r.Variants) == 0 {
		t.Note = "No variant was scored."
		return t
	}
	v := r.Variants[0]
	buckets := v.Intraday.ByBucket
	t.Caption = v.Name + " (main), intraday view"
	var ivs [][]Interval
	for _, b := range buckets {
		ivs = append(ivs, b.Intervals)
	}
	nom := svgPickInterval(0.9, ivs...)
	t.Header = []string{"Lead bucket", "N", "Pinball (MW)", "CRPS (MW)", "Skill vs clim."}
	if nom > 0 {
		lab := svgLevelLabel(nom)
		t.Header = append(t.Header, "Cov. "+lab+" int.", "Width "+lab+" (MW)", "IS "+lab+" (MW)")
	}
	if len(buckets) == 0 {
		t.Note = "The main variant has no per-lead scores."
		return t
	}
	names := svgBucketNames(r, len(buckets))
	for b, s := range buckets {
		row := htmlRow{Cells: []htmlCell{{Text: names[b], Class: "name", Head: true}, {Text: htmlInt(s.N), Class: "num"}}}
		val := func(x float64, f func(float64) string) htmlCell {
			if s.N <= 0 {
				return htmlCell{Text: "–", Class: "num"}
			}
			return htmlCell{Text: f(x), Class: "num"}
		}
		row.Cells = append(row.Cells, val(s.Pinball, htmlNum), val(s.CRPS, htmlNum), val(s.Skill, htmlSigned))
		if nom > 0 {
			iv, ok := svgInterval(s, nom)
			if !ok {
				iv = Interval{Coverage: math.NaN(), Width: math.NaN(), Score: math.NaN()}
			}
			row.Cells = append(row.Cells, val(iv.Coverage, htmlPct), val(iv.Width, htmlNum), val(iv.Score, htmlNum))
		}
		t.Rows = append(t.Rows, row)
	}
	if nom == 0 {
		t.Note = "The level grid holds no central interval, so interval columns are left out."
	} else if !svgSame(nom, 0.9) {
		t.Note = "The level grid holds no 90\u00a0% central interval; the widest one held is shown."
	}
	return t
}

// htmlTemplate is the page. It is kept well-formed as XML (void elements
// self-closed, no named entities) so that tests can check its structure
// with encoding/xml.
const htmlTemplate = `<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8"/>
<meta name="viewport" content="width=device-width, initial-scale=1"/>
<title>{{.Title}}</title>
<style>
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;color:#111;background:#fff;max-width:80rem;margin:0 auto;padding:1rem 1.5rem 3rem;line-height:1.45}
h1{font-size:1.6rem;margin:.5rem 0 1rem}
h2{font-size:1.25rem;border-bottom:1px solid #bbb;padding-bottom:.2rem;margin-top:2.2rem}
h3{font-size:1rem;margin:1.2rem 0 .3rem}
table{border-collapse:collapse;font-size:.82rem;font-variant-numeric:tabular-nums;margin:.4rem 0 .6rem}
th,td{border:1px solid #c8c8c8;padding:.18rem .45rem;vertical-align:top}
thead th{background:#f0f0f0;font-weight:600;text-align:center}
th.name{text-align:left;font-weight:600;background:#fafafa}
td.num{text-align:right;white-space:nowrap}
td.best{background:#d9efd9;font-weight:700}
td.flag{background:#fbe0e0}
tr.main th.name{background:#e8f1fa}
tr.ref th.name{font-weight:400;font-style:italic}
.tag{font-size:.72rem;font-weight:400;color:#555;margin-left:.35rem;font-style:normal}
table.facts th{text-align:left;background:#f6f6f6;width:11rem}
table.facts td{font-size:.9rem}
.caution{border-left:5px solid #b35900;background:#fff4e5;padding:.6rem .9rem;margin:1rem 0}
.note,figcaption{color:#444;font-size:.85rem;max-width:60rem}
nav{font-size:.9rem;margin:.8rem 0}
nav a{margin-right:.8rem}
figure{margin:.8rem 0 1.2rem}
svg{max-width:100%;height:auto;display:block}
.panels{display:flex;flex-wrap:wrap;gap:1rem}
.panels figure{flex:1 1 24rem;margin:.5rem 0}
.wide{overflow-x:auto}
ul.read li{margin:.25rem 0}
footer{margin-top:2.5rem;font-size:.8rem;color:#666}
@page{margin:12mm}
@media print{
body{max-width:none;padding:0;font-size:10pt}
table{font-size:7.5pt}
th,td{padding:1pt 3pt}
nav{display:none}
h2{break-after:avoid}
figure,table,.caution{break-inside:avoid}
.wide{overflow:visible}
td.best,td.flag,thead th,tr.main th.name{-webkit-print-color-adjust:exact;print-color-adjust:exact}
}
</style>
</head>
<body>
<header>
<h1>{{.Title}}</h1>
<table class="facts">
<tbody>
{{range .Facts}}<tr><th>{{.Name}}</th><td>{{.Value}}{{if .Note}}<br/><span class="note">{{.Note}}</span>{{end}}</td></tr>
{{end}}<tr><th>Variants</th><td>{{range $i, $v := .Variants}}{{if $i}}; {{end}}{{$v.Name}}{{if $v.Role}} ({{$v.Role}}){{end}}{{else}}none{{end}}</td></tr>
</tbody>
</table>
<p class="caution"><strong>Caution.</strong> {{.Caution}}</p>
<nav>Sections:
<a href="#compare">{{index .Heads "compare"}}</a>
<a href="#reliability">{{index .Heads "reliability"}}</a>
<a href="#pit">{{index .Heads "pit"}}</a>
<a href="#weekly">{{index .Heads "weekly"}}</a>
<a href="#width">{{index .Heads "width"}}</a>
<a href="#fan">{{index .Heads "fan"}}</a>
<a href="#sites">{{index .Heads "sites"}}</a>
<a href="#leads">{{index .Heads "leads"}}</a>
<a href="#read">{{index .Heads "read"}}</a>
</nav>
</header>
<main>
<section id="compare">
<h2>{{index .Heads "compare"}}</h2>
{{template "table" .Compare}}
</section>
<section id="reliability">
<h2>{{index .Heads "reliability"}}</h2>
<p class="note">Observed coverage (share of outcomes at or below each quantile) against the level. On the dashed diagonal the forecast is calibrated; above it the quantiles are too high, below it too low.</p>
<div class="panels">
{{range .Reliability}}{{template "figure" .}}{{end}}</div>
</section>
<section id="pit">
<h2>{{index .Heads "pit"}}</h2>
{{template "figure" .PIT}}
</section>
<section id="weekly">
<h2>{{index .Heads "weekly"}}</h2>
{{template "figure" .Weekly}}
</section>
<section id="width">
<h2>{{index .Heads "width"}}</h2>
{{template "figure" .Width}}
</section>
<section id="fan">
<h2>{{index .Heads "fan"}}</h2>
{{template "figure" .Fan}}
</section>
<section id="sites">
<h2>{{index .Heads "sites"}}</h2>
{{range .Sites}}{{template "table" .}}{{end}}{{if .SiteNote}}<p class="note">{{.SiteNote}}</p>
{{end}}</section>
<section id="leads">
<h2>{{index .Heads "leads"}}</h2>
{{template "table" .Leads}}
</section>
<section id="alarms">
<h2>{{index .Heads "alarms"}}</h2>
{{template "table" .Alarms}}
</section>
<section id="read">
<h2>{{index .Heads "read"}}</h2>
<ul class="read">
<li><strong>Coverage</strong> of a level is the share of outcomes at or below the forecast quantile of that level; its target is the level itself (0.9 quantile: 90&#160;% of outcomes at or below it). The coverage of a central interval is the share of outcomes inside it; its target is the interval's nominal size. An outcome equal to several quantiles (a calm hour or a clipped night, where the forecast has a point mass) counts as at or below each of them, or inside an interval, by a random draw of its place in that mass (the randomised PIT), so that a calibrated forecast covers at its target.</li>
<li><strong>Reliability diagram and PIT histogram:</strong> a calibrated forecast lies on the diagonal and gives a flat PIT histogram. Pooled over many sites and leads, a small deviation can be significant; look at the coverage tests per site.</li>
<li><strong>Pinball loss and CRPS</strong> (in MW) reward forecasts that are both calibrated and sharp; lower is better. CRPS here is twice the mean pinball loss over the levels.</li>
<li><strong>Skill</strong> is 1 − pinball / climatology's pinball on the same forecasts: above 0 the variant beats climatology.</li>
<li><strong>Interval score</strong> (MW) is the interval's width plus a penalty for each outcome outside it: it rewards narrow intervals that hold.</li>
<li><strong>Coverage tests:</strong> Kupiec tests whether the share of misses matches the level; Christoffersen whether misses cluster (a miss making the next one more likely). p &lt; 0.05 is flagged; with many sites and levels a few flags are expected by chance.</li>
<li><strong>Trading value</strong> compares the expected imbalance cost of bidding the median with bidding the quantile at the cost-optimal level long / (short + long); it is only as good as the imbalance prices above.</li>
</ul>
</section>
</main>
<footer>Written by plumb backtest; report schema {{.Schema}}. The same numbers are in report.json.</footer>
</body>
</html>
{{define "figure"}}<figure>
{{if .SVG}}{{.SVG}}{{else}}<p class="note"><em>{{.Note}}</em></p>
{{end}}{{if .Caption}}<figcaption>{{.Caption}}</figcaption>
{{end}}</figure>
{{end}}{{define "table"}}{{if .Caption}}<h3>{{.Caption}}</h3>
{{end}}{{if .Rows}}<div class="wide"><table>
<thead>
{{if .Groups}}<tr>{{range .Groups}}<th colspan="{{.Span}}">{{.Text}}</th>{{end}}</tr>
{{end}}<tr>{{range .Header}}<th>{{.}}</th>{{end}}</tr>
</thead>
<tbody>
{{range .Rows}}<tr{{if .Class}} class="{{.Class}}"{{end}}>{{range .Cells}}{{if ge .Span 0}}{{if .Head}}<th class="{{.Class}}"{{if gt .Span 1}} rowspan="{{.Span}}"{{end}}>{{.Text}}{{if .Tag}}<span class="tag">{{.Tag}}</span>{{end}}</th>{{else}}<td class="{{.Class}}"{{if gt .Span 1}} rowspan="{{.Span}}"{{end}}>{{.Text}}</td>{{end}}{{end}}{{end}}</tr>
{{end}}</tbody>
</table></div>
{{end}}{{if .Note}}<p class="note">{{.Note}}</p>
{{end}}{{end}}`
