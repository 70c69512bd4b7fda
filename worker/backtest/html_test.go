package backtest

import (
	"bytes"
	"encoding/json"
	"encoding/xml"
	"errors"
	"flag"
	"fmt"
	"html"
	"io"
	"math"
	"os"
	"reflect"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
)

// htmlExampleOut, when set, makes TestHTMLExample write the synthetic
// report there (and each plot as PNG beside it) for a person to look at.
var htmlExampleOut = flag.String("html-example", "", "write an example report.html (and plot PNGs) to this path")

// htmlTestShape sizes a synthetic report.
type htmlTestShape struct {
	variants, levels, weeks, buckets, fanHours, sites int
}

// htmlTestReport builds a Report by hand for the rendering tests. Every
// number in it is invented (these tests check the rendering, not the
// scoring): coverage is the level plus a made-up bias, losses, p-values
// and costs are made-up, the sites are invented places.
func htmlTestReport(sh htmlTestShape) *Report {
	levels := make([]float64, sh.levels)
	for i := range levels {
		levels[i] = math.Round(float64(i+1)/float64(sh.levels+1)*1e6) / 1e6
	}
	siteNames := []string{"Hollow Ridge", "Saltmarsh Flats", "Kestrel Down", "Brackenmoor"}
	bucketNames := []string{"0-1h", "1-2h", "2-4h", "4-6h", "6-12h", "12-24h", "24-36h", "36-48h"}
	names := [][2]string{{"gbm", "aci"}, {"gbm", "none"}, {"climatology", "none"}, {"persistence", "none"}}
	from := time.Date(2024, 1, 1, 0, 0, 0, 0, time.UTC) // a Monday
	r := &Report{
		Schema: ReportSchema, Data: "/data/invented-fleet",
		From: from, To: from.AddDate(0, 0, 7*sh.weeks),
		Sites: siteNames[:sh.sites], Levels: levels, Buckets: bucketNames[:sh.buckets],
		DayAheadHour: 12,
		Costs:        Costs{Short: 90, Long: 30, CriticalLevel: 0.25, Currency: "EUR"},
		Refused:      3,
	}
	scores := func(n int, bias, mw float64) Scores {
		s := Scores{N: n}
		if n == 0 {
			return s
		}
		for _, l := range levels {
			c := l + bias*math.Sin(math.Pi*l)
			s.Coverage = append(s.Coverage, c)
			pin := mw * (0.2 + l*(1-l))
			s.PinballByLevel = append(s.PinballByLevel, pin)
			s.Pinball += pin / float64(len(levels))
			s.KupiecP = append(s.KupiecP, math.Exp(-300*math.Abs(c-l)))
			s.ChristoffersenP = append(s.ChristoffersenP, math.Exp(-150*math.Abs(c-l)))
		}
		s.CRPS = 2 * s.Pinball
		for _, nom := range []float64{0.5, 0.8, 0.9} {
			lo, hi := svgClosestLevel(levels, (1-nom)/2), svgClosestLevel(levels, (1+nom)/2)
			if lo < 0 || !svgSame(levels[lo], (1-nom)/2) || !svgSame(levels[hi], (1+nom)/2) {
				continue
			}
			s.Intervals = append(s.Intervals, Interval{
				Nominal: nom, Lower: levels[lo], Upper: levels[hi],
				Coverage: s.Coverage[hi] - s.Coverage[lo], Width: mw * 4 * nom, Score: mw * 6 * nom,
			})
		}
		return s
	}
	for v := range sh.variants {
		nm := names[v%len(names)]
		bias := []float64{0.01, -0.06, 0.002, -0.03}[v%4]
		mw := []float64{1.2, 1.4, 2.6, 2.1}[v%4]
		vr := Variant{Name: nm[0] + "+" + nm[1], Model: nm[0], Calibrator: nm[1], Reference: v >= 2}
		if v >= len(names) {
			vr.Name = fmt.Sprintf("%s-%d", vr.Name, v)
		}
		for k, view := range []*View{&vr.Intraday, &vr.DayAhead} {
			n := []int{40000, 6000}[k]
			view.All = scores(n, bias, mw)
			for b := range sh.buckets {
				view.ByBucket = append(view.ByBucket, scores(n/sh.buckets, bias*(1+0.1*float64(b)), mw*(1+0.15*float64(b))))
			}
			for si, site := range r.Sites {
				ss := SiteScores{Site: site, Scores: scores(n/sh.sites, bias*(1+0.2*float64(si)), mw*(0.8+0.3*float64(si)))}
				ss.Trading = Trading{EnergyMWh: 5000 + 1000*float64(si), CostMedian: 40000 * mw, CostOptimal: 34000 * mw}
				ss.Trading.Saving = 1 - ss.Trading.CostOptimal/ss.Trading.CostMedian
				view.BySite = append(view.BySite, ss)
			}
		}
		vr.Intraday.All.Skill = 1 - mw/2.6 // against the invented climatology's 2.6 MW
		vr.DayAhead.All.Skill = vr.Intraday.All.Skill
		for w := range sh.weeks {
			p := Period{Start: from.AddDate(0, 0, 7*w), N: 700 + 40*(w%7)}
			if w == sh.weeks/3 {
				p.N = 0 // a week without data, drawn as a gap
			}
			for _, l := range levels {
				c := 0.0
				if p.N > 0 {
					c = l + bias*math.Sin(math.Pi*l) + 0.02*math.Sin(float64(w)/5)
				}
				p.Coverage = append(p.Coverage, c)
			}
			vr.Weekly = append(vr.Weekly, p)
		}
		if v == 0 && sh.fanHours > 0 {
			vr.Fan = htmlTestFan(levels, sh.fanHours, r.Sites[0])
		}
		r.Variants = append(r.Variants, vr)
	}
	return r
}

// htmlTestFan invents a week of hourly solar-shaped forecasts and outcomes.
func htmlTestFan(levels []float64, hours int, site string) *Fan {
	f := &Fan{Site: site}
	start := time.Date(2024, 6, 3, 0, 0, 0, 0, time.UTC)
	for h := range hours {
		vs := start.Add(time.Duration(h) * time.Hour)
		med := 40 * math.Max(0, math.Sin(math.Pi*float64(h%24-6)/12))
		spread := 0.5 + 0.25*med
		row := FanRow{ValidStart: vs, IssuedAt: time.Date(vs.Year(), vs.Month(), vs.Day()-1, 12, 0, 0, 0, time.UTC)}
		for _, l := range levels {
			row.Q = append(row.Q, math.Max(0, med+spread*distuv.UnitNormal.Quantile(l)))
		}
		if h < hours-5 {
			row.Observed, row.HasObserved = math.Max(0, med+0.9*spread*math.Sin(1.7*float64(h))), true
		}
		f.Rows = append(f.Rows, row)
	}
	return f
}

// htmlTestFull is the usual synthetic report: 3 variants, 19 levels.
func htmlTestFull() *Report {
	return htmlTestReport(htmlTestShape{variants: 3, levels: 19, weeks: 30, buckets: 6, fanHours: 168, sites: 2})
}

// htmlRender renders r and fails the test on error.
func htmlRender(t *testing.T, r *Report) string {
	t.Helper()
	var buf bytes.Buffer
	if err := WriteHTML(&buf, r); err != nil {
		t.Fatalf("WriteHTML: %v", err)
	}
	return buf.String()
}

// htmlSVGs returns the inline SVG elements of doc.
func htmlSVGs(doc string) []string {
	var out []string
	for {
		i := strings.Index(doc, "<svg")
		if i < 0 {
			return out
		}
		j := strings.Index(doc[i:], "</svg>")
		if j < 0 {
			return append(out, doc[i:])
		}
		out = append(out, doc[i:i+j+len("</svg>")])
		doc = doc[i+j+len("</svg>"):]
	}
}

// htmlCheckXML fails unless doc is well-formed XML (balanced, properly
// nested and quoted), which the page is kept to on purpose.
func htmlCheckXML(t *testing.T, what, doc string) {
	t.Helper()
	d := xml.NewDecoder(strings.NewReader(doc))
	d.Strict = true
	for {
		_, err := d.Token()
		if errors.Is(err, io.EOF) {
			return
		}
		if err != nil {
			line := ""
			if n, _ := d.InputPos(); n > 0 {
				if ls := strings.Split(doc, "\n"); n-1 < len(ls) {
					line = ls[n-1]
				}
			}
			t.Fatalf("%s is not well-formed: %v\nline: %.300s", what, err, line)
		}
	}
}

// htmlCheckClean fails on text a page must never hold: non-numbers and
// anything fetched from elsewhere.
func htmlCheckClean(t *testing.T, doc string) {
	t.Helper()
	for _, bad := range []string{"NaN", "+Inf", "-Inf", `src="http`, `href="http`, "src='http", "href='http", "url(", "@import", "<script", "<link"} {
		if strings.Contains(doc, bad) {
			i := strings.Index(doc, bad)
			t.Errorf("page holds %q: ...%s...", bad, doc[max(0, i-80):min(len(doc), i+80)])
		}
	}
}

func TestWriteJSONRoundTrip(t *testing.T) {
	want := htmlTestFull()
	var buf bytes.Buffer
	if err := WriteJSON(&buf, want); err != nil {
		t.Fatalf("WriteJSON: %v", err)
	}
	out := buf.String()
	if !strings.HasPrefix(out, "{\n  \"schema\": 1,\n") || !strings.HasSuffix(out, "}\n") {
		t.Errorf("not two-space indented JSON ending in a newline:\n%.200s", out)
	}
	var got Report
	if err := json.Unmarshal(buf.Bytes(), &got); err != nil {
		t.Fatalf("decode: %v", err)
	}
	if !reflect.DeepEqual(&got, want) {
		t.Errorf("report changed through JSON")
		a, _ := json.Marshal(&got)
		b, _ := json.Marshal(want)
		if !bytes.Equal(a, b) {
			t.Errorf("and its encoding differs too")
		}
	}
}

func TestWriteJSONRejectsNonFinite(t *testing.T) {
	cases := []struct {
		name  string
		spoil func(r *Report)
		field string
	}{
		{"NaN pinball", func(r *Report) { r.Variants[0].Intraday.All.Pinball = math.NaN() }, "variants[0].intraday.all.pinball is NaN"},
		{"Inf critical level", func(r *Report) { r.Costs.CriticalLevel = math.Inf(1) }, "costs.critical_level is +Inf"},
		{"NaN site coverage", func(r *Report) { r.Variants[1].DayAhead.BySite[1].Scores.Coverage[3] = math.NaN() },
			"variants[1].day_ahead.by_site[1].scores.coverage[3] is NaN"},
		{"NaN fan quantile", func(r *Report) { r.Variants[0].Fan.Rows[7].Q[2] = math.NaN() }, "variants[0].fan.rows[7].q[2] is NaN"},
		{"-Inf weekly", func(r *Report) { r.Variants[2].Weekly[4].Coverage[0] = math.Inf(-1) }, "variants[2].weekly[4].coverage[0] is -Inf"},
		{"NaN level", func(r *Report) { r.Levels[0] = math.NaN() }, "levels[0] is NaN"},
		{"NaN interval score", func(r *Report) { r.Variants[0].Intraday.ByBucket[2].Intervals[1].Score = math.NaN() },
			"variants[0].intraday.by_lead_bucket[2].intervals[1].mean_interval_score is NaN"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := htmlTestFull()
			c.spoil(r)
			var buf bytes.Buffer
			err := WriteJSON(&buf, r)
			if err == nil {
				t.Fatal("WriteJSON accepted a non-finite number")
			}
			if !strings.Contains(err.Error(), c.field) || !strings.HasPrefix(err.Error(), "backtest: write json: ") {
				t.Errorf("error %q does not name %q", err, c.field)
			}
			if buf.Len() != 0 {
				t.Errorf("wrote %d bytes before failing", buf.Len())
			}
		})
	}
	t.Run("nil report", func(t *testing.T) {
		if err := WriteJSON(io.Discard, nil); err == nil {
			t.Error("WriteJSON accepted a nil report")
		}
	})
}

func TestWriteHTMLContents(t *testing.T) {
	r := htmlTestFull()
	// An invented alarm count, to check the alarm table.
	r.Variants[0].Alarms = []AlarmCount{{Site: r.Sites[0], Kind: "raw_drift", Raised: 7,
		First: time.Date(2026, 3, 20, 12, 45, 0, 0, time.UTC)}}
	doc := htmlRender(t, r)
	text := html.UnescapeString(doc)
	if !strings.Contains(text, "raw_drift") || !strings.Contains(text, "2026-03-20 12:45") {
		t.Error("alarm table lacks the alarm")
	}
	for _, h := range []string{htmlHeadCompare, htmlHeadReliability, htmlHeadPIT, htmlHeadWeekly, htmlHeadWidth,
		htmlHeadFan, htmlHeadSites, htmlHeadLeads, htmlHeadAlarms, htmlHeadRead} {
		if !strings.Contains(doc, "<h2>"+h+"</h2>") {
			t.Errorf("no section heading %q", h)
		}
	}
	for _, v := range r.Variants {
		if !strings.Contains(text, v.Name) {
			t.Errorf("variant %q missing", v.Name)
		}
	}
	for _, s := range r.Sites {
		if !strings.Contains(text, s) {
			t.Errorf("site %q missing", s)
		}
	}
	if !strings.Contains(doc, htmlCaution) {
		t.Error("caution text missing")
	}
	for _, want := range []string{
		"/data/invented-fleet", "from 2024-01-01 00:00 UTC up to (not including) 2024-07-29 00:00 UTC: 210 days", "19 levels, 0.05 to 0.95 in steps of 0.05", "12:00 UTC",
		"short 90 EUR/MWh, long 30 EUR/MWh", "Given by the user.",
		"Kupiec p 10\u00a0%", "Christoffersen p 90\u00a0%", "Cov. 90\u00a0% int.",
		"Mean width of the 80\u00a0% central interval by lead", "Weekly coverage", "5–95\u00a0%",
	} {
		if !strings.Contains(text, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	svgs := htmlSVGs(doc)
	// Two reliability panels, PIT, weekly coverage, width by lead, fan.
	if len(svgs) != 6 || strings.Count(doc, "<svg") != 6 {
		t.Errorf("%d svg elements, want 6", len(svgs))
	}
	titles := []string{"Intraday view", "Day-ahead view (issued 12:00 UTC, leads under 24 h)",
		"PIT histogram: gbm+aci, intraday (N = 40000)", "Weekly coverage: gbm+aci, intraday",
		"Mean width of the 80\u00a0% central interval by lead (intraday)", "Day-ahead fan chart: gbm+aci, site Hollow Ridge"}
	for i, s := range svgs {
		htmlCheckXML(t, fmt.Sprintf("svg %d", i), s)
		if i < len(titles) && !strings.Contains(html.UnescapeString(s), ">"+titles[i]+"<") {
			t.Errorf("svg %d lacks the title %q", i, titles[i])
		}
	}
	htmlCheckXML(t, "page", doc)
	htmlCheckClean(t, doc)
	// The p-values invented above fall under 0.05 for the biased variant.
	if !strings.Contains(doc, `class="num flag"`) {
		t.Error("no p-value flagged")
	}
	if !strings.Contains(doc, `class="num best"`) {
		t.Error("no best value highlighted")
	}
}

func TestWriteHTMLBestHighlighted(t *testing.T) {
	r := htmlTestFull()
	// Variant 1 now has the lowest intraday pinball and the coverage of the
	// 90 % interval closest to 0.9; variant 2 the highest skill.
	r.Variants[1].Intraday.All.Pinball = 0.1
	r.Variants[2].Intraday.All.Skill = 0.9
	for i := range r.Variants {
		r.Variants[i].Intraday.All.Intervals[2].Coverage = []float64{0.95, 0.899, 0.85}[i]
	}
	tab := htmlCompare(r)
	cols := htmlCompareCols()
	col := func(head string) int {
		for j, c := range cols {
			if c.head == head {
				return 1 + len(cols) + j // name, day-ahead block, intraday block
			}
		}
		t.Fatalf("no column %q", head)
		return -1
	}
	cases := []struct {
		head string
		best int
	}{{"Pinball (MW)", 1}, {"Skill vs clim.", 2}, {"Cov. 90\u00a0% int.", 1}, {"N", -1}}
	for _, c := range cases {
		t.Run(c.head, func(t *testing.T) {
			j := col(c.head)
			for i, row := range tab.Rows {
				isBest := row.Cells[j].Class == "num best"
				if isBest != (i == c.best) {
					t.Errorf("row %d (%s): best = %v, want %v", i, r.Variants[i].Name, isBest, i == c.best)
				}
			}
		})
	}
}

func TestWriteHTMLBestTiesAsPrinted(t *testing.T) {
	r := htmlTestFull()
	// 0.45012 and 0.45034 both print as 0.450: both are marked.
	for i, p := range []float64{0.45012, 0.45034, 0.6} {
		r.Variants[i].DayAhead.All.Pinball = p
	}
	tab := htmlCompare(r)
	const col = 2 // name, N, pinball of the day-ahead block
	for i, want := range []bool{true, true, false} {
		c := tab.Rows[i].Cells[col]
		if got := c.Class == "num best"; got != want || c.Text != []string{"0.450", "0.450", "0.600"}[i] {
			t.Errorf("row %d: %q best = %v, want %v", i, c.Text, got, want)
		}
	}
}

func TestHTMLBest(t *testing.T) {
	cases := []struct {
		name string
		vals []float64
		ok   []bool
		rank float64
		want []bool
	}{
		{"lowest", []float64{3, 1, 2}, []bool{true, true, true}, -1, []bool{false, true, false}},
		{"highest", []float64{3, 1, 2}, []bool{true, true, true}, 1, []bool{true, false, false}},
		{"closest to 0.8", []float64{0.7, 0.83, 0.78}, []bool{true, true, true}, 0.8, []bool{false, false, true}},
		{"ties all marked", []float64{1, 1, 2}, []bool{true, true, true}, -1, []bool{true, true, false}},
		{"not counted skipped", []float64{0, 1, 2}, []bool{false, true, true}, -1, []bool{false, true, false}},
		{"one candidate marks none", []float64{0, 1}, []bool{false, true}, -1, []bool{false, false}},
		{"unranked", []float64{0, 1}, []bool{true, true}, 0, []bool{false, false}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := htmlBest(c.vals, c.ok, c.rank); !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %v, want %v", got, c.want)
			}
		})
	}
}

func TestWriteHTMLDegenerateReports(t *testing.T) {
	cases := []struct {
		name  string
		make  func() *Report
		svgs  int
		wants []string
	}{
		{"no fan", func() *Report { r := htmlTestFull(); r.Variants[0].Fan = nil; return r }, 5,
			[]string{"carries no fan data"}},
		{"fan without rows", func() *Report { r := htmlTestFull(); r.Variants[0].Fan.Rows = nil; return r }, 5,
			[]string{"carries no fan data"}},
		{"day-ahead N = 0", func() *Report {
			r := htmlTestFull()
			for i := range r.Variants {
				r.Variants[i].DayAhead = View{All: Scores{}, BySite: []SiteScores{{Site: r.Sites[0]}}}
			}
			return r
		}, 5, []string{"No day-ahead forecasts were scored"}},
		{"main variant N = 0", func() *Report {
			r := htmlTestFull()
			r.Variants[0].Intraday.All = Scores{}
			r.Variants[0].Weekly = nil
			return r
		}, 4, []string{"no scored intraday forecasts", "no weekly coverage"}},
		{"one variant", func() *Report { r := htmlTestFull(); r.Variants = r.Variants[:1]; return r }, 6, nil},
		{"no 80 % pair", func() *Report {
			return htmlTestReport(htmlTestShape{variants: 2, levels: 3, weeks: 5, buckets: 3, fanHours: 30, sites: 1})
		}, 6, []string{"Mean width of the 50\u00a0% central interval", "Cov. 50\u00a0% int.", "25–75\u00a0%",
			"no 90\u00a0% central interval; the widest one held is shown"}},
		{"one level", func() *Report {
			return htmlTestReport(htmlTestShape{variants: 2, levels: 1, weeks: 3, buckets: 2, fanHours: 24, sites: 1})
		}, 5, []string{"1 level: 0.5", "No lead bucket holds a central interval", "interval columns are left out"}},
		{"empty report", func() *Report { return &Report{} }, 0, []string{"No variant was scored", "none"}},
		{"short slices", func() *Report {
			r := htmlTestFull()
			r.Variants[0].Intraday.All.Coverage = r.Variants[0].Intraday.All.Coverage[:4]
			r.Variants[1].Intraday.All.Coverage = nil
			r.Variants[0].Weekly[2].Coverage = nil
			r.Variants[0].Fan.Rows[3].Q = r.Variants[0].Fan.Rows[3].Q[:2]
			r.Variants[1].DayAhead.BySite = r.Variants[1].DayAhead.BySite[:1]
			r.Variants[1].Intraday.BySite[0].Scores.KupiecP = nil
			r.Buckets = r.Buckets[:2]
			r.Sites = r.Sites[:1]
			return r
		}, 5, []string{"bucket 3", "Saltmarsh Flats", "needs increasing levels"}},
		{"non-finite numbers", func() *Report {
			r := htmlTestFull()
			r.Variants[0].Intraday.All.Pinball = math.NaN()
			r.Variants[1].Intraday.All.Coverage[3] = math.Inf(1)
			r.Variants[0].Weekly[1].Coverage[0] = math.NaN()
			r.Variants[0].Fan.Rows[10].Q[5] = math.NaN()
			r.Variants[0].Fan.Rows[11].Observed = math.Inf(-1)
			r.Variants[0].Intraday.ByBucket[1].Intervals[1].Width = math.NaN()
			r.Variants[0].DayAhead.BySite[0].Trading.Saving = math.NaN()
			r.Costs.CriticalLevel = math.NaN()
			return r
		}, 6, []string{"bid at level – (EUR)"}},
		{"unsorted rows and weeks", func() *Report {
			r := htmlTestFull()
			w, f := r.Variants[0].Weekly, r.Variants[0].Fan.Rows
			w[0], w[len(w)-1] = w[len(w)-1], w[0]
			f[0], f[len(f)-1] = f[len(f)-1], f[0]
			return r
		}, 6, nil},
		{"illustrative costs", func() *Report {
			r := htmlTestFull()
			r.Costs = Costs{Short: DefaultCostShort, Long: DefaultCostLong, CriticalLevel: 0.2, Currency: "EUR", Illustrative: true}
			return r
		}, 6, []string{"Illustrative defaults, not market prices", "Cost, median bid (EUR)"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			doc := htmlRender(t, c.make())
			text := html.UnescapeString(doc)
			if n := len(htmlSVGs(doc)); n != c.svgs {
				t.Errorf("%d svg elements, want %d", n, c.svgs)
			}
			for _, w := range c.wants {
				if !strings.Contains(text, w) {
					t.Errorf("page lacks %q", w)
				}
			}
			for _, h := range []string{htmlHeadCompare, htmlHeadFan, htmlHeadRead} {
				if !strings.Contains(doc, "<h2>"+h+"</h2>") {
					t.Errorf("no section heading %q", h)
				}
			}
			htmlCheckXML(t, "page", doc)
			htmlCheckClean(t, doc)
		})
	}
	t.Run("nil report", func(t *testing.T) {
		if err := WriteHTML(io.Discard, nil); err == nil {
			t.Error("WriteHTML accepted a nil report")
		}
	})
}

func TestWriteHTMLDeterministic(t *testing.T) {
	a := htmlRender(t, htmlTestFull())
	b := htmlRender(t, htmlTestFull())
	if a != b {
		i := 0
		for i < len(a) && i < len(b) && a[i] == b[i] {
			i++
		}
		t.Fatalf("two renderings differ at byte %d: %q vs %q", i, a[i:min(len(a), i+60)], b[i:min(len(b), i+60)])
	}
}

func TestWriteHTMLEscapesNames(t *testing.T) {
	r := htmlTestFull()
	r.Sites[0] = `<b>Ridge & "Co"</b>`
	for i := range r.Variants {
		for k := range r.Variants[i].Intraday.BySite {
			if k == 0 {
				r.Variants[i].Intraday.BySite[k].Site = r.Sites[0]
				r.Variants[i].DayAhead.BySite[k].Site = r.Sites[0]
			}
		}
	}
	r.Variants[0].Fan.Site = r.Sites[0]
	r.Variants[1].Name = "<script>alert(1)</script>"
	r.Data = `/data/"quoted" <dir>`
	doc := htmlRender(t, r)
	for _, raw := range []string{"<b>", "<script>", "<dir>"} {
		if strings.Contains(doc, raw) {
			t.Errorf("raw %q in the page", raw)
		}
	}
	text := html.UnescapeString(doc)
	for _, s := range []string{r.Sites[0], r.Variants[1].Name, r.Data} {
		if !strings.Contains(text, s) {
			t.Errorf("%q not shown", s)
		}
	}
	htmlCheckXML(t, "page", doc)
}

func TestWriteHTMLLargeReportSize(t *testing.T) {
	// 4 variants, 99 levels, 150 weeks, 8 buckets, a week of hourly fan.
	r := htmlTestReport(htmlTestShape{variants: 4, levels: 99, weeks: 150, buckets: 8, fanHours: 168, sites: 4})
	doc := htmlRender(t, r)
	if len(doc) >= 2<<20 {
		t.Errorf("page is %d bytes, want under 2 MB", len(doc))
	}
	if n := len(htmlSVGs(doc)); n != 6 {
		t.Errorf("%d svg elements, want 6", n)
	}
	if !strings.Contains(html.UnescapeString(doc), "99 levels, 0.01 to 0.99 in steps of 0.01") {
		t.Error("level grid not summarised")
	}
	htmlCheckXML(t, "page", doc)
	htmlCheckClean(t, doc)
	t.Logf("page size %d bytes", len(doc))
}

func TestHTMLPITBars(t *testing.T) {
	// Hand-computed: levels 0.25, 0.5, 0.75 with coverage 0.2, 0.5, 0.9
	// give shares 0.2, 0.3, 0.4, 0.1 over gaps of 0.25 each, so heights
	// 0.8, 1.2, 1.6, 0.4.
	got := svgPITBars([]float64{0.25, 0.5, 0.75}, []float64{0.2, 0.5, 0.9})
	want := []svgPITBar{{0, 0.25, 0.2, 0.8}, {0.25, 0.5, 0.3, 1.2}, {0.5, 0.75, 0.4, 1.6}, {0.75, 1, 0.1, 0.4}}
	if len(got) != len(want) {
		t.Fatalf("got %d bars, want %d", len(got), len(want))
	}
	for i := range want {
		g, w := got[i], want[i]
		if math.Abs(g.Lo-w.Lo) > 1e-12 || math.Abs(g.Hi-w.Hi) > 1e-12 || math.Abs(g.Share-w.Share) > 1e-12 || math.Abs(g.Height-w.Height) > 1e-12 {
			t.Errorf("bar %d = %+v, want %+v", i, g, w)
		}
	}
	// Uneven gaps (hand-computed): levels 0.1, 0.5 with calibrated
	// coverage give flat bars of height 1.
	for i, b := range svgPITBars([]float64{0.1, 0.5}, []float64{0.1, 0.5}) {
		if math.Abs(b.Height-1) > 1e-12 {
			t.Errorf("calibrated bar %d has height %v, want 1", i, b.Height)
		}
	}
	bad := []struct {
		name           string
		levels, covers []float64
	}{
		{"no levels", nil, nil},
		{"short coverage", []float64{0.1, 0.5}, []float64{0.1}},
		{"not increasing", []float64{0.5, 0.1}, []float64{0.5, 0.1}},
		{"level 1", []float64{0.5, 1}, []float64{0.5, 1}},
		{"NaN", []float64{0.5}, []float64{math.NaN()}},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			if got := svgPITBars(c.levels, c.covers); got != nil {
				t.Errorf("got %v, want nil", got)
			}
		})
	}
}

func TestHTMLBinomialBand(t *testing.T) {
	// Hand-computed: sqrt(tau (1 - tau) / N); tau 0.1, N 100: 0.03;
	// tau 0.5, N 25: 0.1; tau 0.9, N 4: 0.15 (upper end clipped at 1).
	cases := []struct {
		name   string
		tau    float64
		n      int
		lo, hi float64
	}{
		{"tau 0.1 N 100", 0.1, 100, 0.04, 0.16},
		{"tau 0.5 N 25", 0.5, 25, 0.3, 0.7},
		{"tau 0.9 N 4 clipped", 0.9, 4, 0.6, 1},
		{"N 0", 0.5, 0, 0, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			lo, hi := svgBinomialBand(c.tau, c.n)
			if math.Abs(lo-c.lo) > 1e-12 || math.Abs(hi-c.hi) > 1e-12 {
				t.Errorf("got [%v, %v], want [%v, %v]", lo, hi, c.lo, c.hi)
			}
		})
	}
}

func TestHTMLLevelChoice(t *testing.T) {
	grid := []float64{0.05, 0.25, 0.5, 0.75, 0.95}
	if got := svgLevelsNear(grid, 0.1, 0.5, 0.9); !reflect.DeepEqual(got, []int{0, 2, 4}) {
		t.Errorf("levels near 0.1, 0.5, 0.9: got %v, want [0 2 4]", got)
	}
	if got := svgLevelsNear([]float64{0.5}, 0.1, 0.5, 0.9); !reflect.DeepEqual(got, []int{0}) {
		t.Errorf("one level: got %v, want [0]", got)
	}
	if got := svgClosestLevel(nil, 0.5); got != -1 {
		t.Errorf("no levels: got %d, want -1", got)
	}
	pairs := []struct {
		name   string
		levels []float64
		want   []float64
	}{
		{"5 % grid", []float64{0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5, 0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95}, []float64{0.9, 0.8, 0.5}},
		{"quartiles", []float64{0.25, 0.5, 0.75}, []float64{0.5}},
		{"odd pairs", []float64{0.2, 0.3, 0.5, 0.7, 0.8}, []float64{0.6, 0.4}},
		{"many odd pairs", []float64{0.02, 0.15, 0.2, 0.3, 0.7, 0.8, 0.85, 0.98}, []float64{0.96, 0.6, 0.4}},
		{"no pairs", []float64{0.3, 0.5}, nil},
	}
	for _, c := range pairs {
		t.Run(c.name, func(t *testing.T) {
			var got []float64
			for _, p := range svgFanPairs(c.levels) {
				got = append(got, math.Round(p.Nominal*1e9)/1e9)
			}
			if !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %v, want %v", got, c.want)
			}
		})
	}
	ivs := []Interval{{Nominal: 0.5}, {Nominal: 0.9}}
	if got := svgPickInterval(0.8, ivs); got != 0.9 {
		t.Errorf("no 80 %% interval: picked %v, want the widest 0.9", got)
	}
	if got := svgPickInterval(0.8, ivs, []Interval{{Nominal: 0.8}}); got != 0.8 {
		t.Errorf("picked %v, want 0.8", got)
	}
	if got := svgPickInterval(0.8); got != 0 {
		t.Errorf("no intervals: picked %v, want 0", got)
	}
}

func TestHTMLTimeTicks(t *testing.T) {
	unix := func(s string) float64 {
		tm, err := time.Parse(time.RFC3339, s)
		if err != nil {
			t.Fatal(err)
		}
		return svgUnix(tm)
	}
	labels := func(lo, hi string) []string {
		var out []string
		for _, tk := range (svgTimeTicks{}).Ticks(unix(lo), unix(hi)) {
			if tk.Label != "" {
				out = append(out, tk.Label)
			}
		}
		return out
	}
	cases := []struct {
		name, lo, hi string
		want         []string
	}{
		// 2024-06-03 is a Monday; 2024-01-01 too.
		{"one week by day", "2024-06-03T00:00:00Z", "2024-06-10T00:00:00Z",
			[]string{"Mon 03 Jun", "Tue 04 Jun", "Wed 05 Jun", "Thu 06 Jun", "Fri 07 Jun", "Sat 08 Jun", "Sun 09 Jun", "Mon 10 Jun"}},
		{"a day by 6 h", "2024-06-03T03:00:00Z", "2024-06-04T00:00:00Z",
			[]string{"03 Jun 06:00", "03 Jun 12:00", "03 Jun 18:00", "04 Jun 00:00"}},
		{"two weeks by week", "2026-03-02T00:00:00Z", "2026-03-16T00:00:00Z", []string{"02 Mar", "09 Mar", "16 Mar"}},
		{"a month by week", "2024-01-03T00:00:00Z", "2024-02-01T00:00:00Z", []string{"08 Jan", "15 Jan", "22 Jan", "29 Jan"}},
		{"150 weeks by quarter", "2024-01-01T00:00:00Z", "2026-11-16T00:00:00Z",
			[]string{"Jan 2024", "Apr 2024", "Jul 2024", "Oct 2024", "Jan 2025", "Apr 2025", "Jul 2025", "Oct 2025", "Jan 2026", "Apr 2026", "Jul 2026", "Oct 2026"}},
		{"ten years by year", "2015-06-01T00:00:00Z", "2025-06-01T00:00:00Z",
			[]string{"2016", "2017", "2018", "2019", "2020", "2021", "2022", "2023", "2024", "2025"}},
		{"empty span", "2024-01-01T00:00:00Z", "2024-01-01T00:00:00Z", nil},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := labels(c.lo, c.hi); !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %q, want %q", got, c.want)
			}
		})
	}
}

// TestHTMLExample writes the synthetic report and its plots as PNG when
// -html-example is given, for a person to look at.
func TestHTMLExample(t *testing.T) {
	if *htmlExampleOut == "" {
		t.Skip("no -html-example path given")
	}
	r := htmlTestReport(htmlTestShape{variants: 4, levels: 19, weeks: 60, buckets: 8, fanHours: 168, sites: 3})
	var buf bytes.Buffer
	if err := WriteHTML(&buf, r); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(*htmlExampleOut, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	base := strings.TrimSuffix(*htmlExampleOut, ".html")
	figs := map[string]func(*Report) (*svgFigure, string){
		"reliability": func(r *Report) (*svgFigure, string) { return svgReliability(r, false) },
		"pit":         svgPIT, "weekly": svgWeekly, "width": svgWidthByLead, "fan": svgFan,
	}
	for name, build := range figs {
		fig, note := build(r)
		if fig == nil {
			t.Fatalf("%s: %s", name, note)
		}
		c := vgimg.New(fig.width, fig.height)
		fig.draw(draw.New(c))
		f, err := os.Create(fmt.Sprintf("%s-%s.png", base, name))
		if err != nil {
			t.Fatal(err)
		}
		if _, err := (vgimg.PngCanvas{Canvas: c}).WriteTo(f); err != nil {
			t.Fatal(err)
		}
		if err := f.Close(); err != nil {
			t.Fatal(err)
		}
	}
}

func TestHTMLNumTicks(t *testing.T) {
	labels := func(lo, hi float64) []string {
		var out []string
		for _, tk := range (svgNumTicks{}).Ticks(lo, hi) {
			if tk.Label != "" {
				out = append(out, tk.Label)
			}
		}
		return out
	}
	cases := []struct {
		name   string
		lo, hi float64
		want   []string
	}{
		{"unit", 0, 1, []string{"0.0", "0.2", "0.4", "0.6", "0.8", "1.0"}},
		{"power", 0, 57, []string{"0", "20", "40"}},
		{"quarter steps", 0, 12, []string{"0.0", "2.5", "5.0", "7.5", "10.0"}},
		{"negative start", -0.3, 1.2, []string{"0.0", "0.5", "1.0"}},
		{"small", 0.001, 0.0042, []string{"0.001", "0.002", "0.003", "0.004"}},
		{"empty", 1, 1, nil},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := labels(c.lo, c.hi); !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %q, want %q", got, c.want)
			}
		})
	}
}

// TestRecovery: rolling coverage against nominal and against a base
// report, worked by hand on three-day windows.
func TestRecovery(t *testing.T) {
	d0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	mk := func(hits ...int) *Report {
		r := &Report{Variants: []Variant{{}}}
		for i, h := range hits {
			r.Variants[0].Daily = append(r.Variants[0].Daily, Day{Start: d0.AddDate(0, 0, i), N: 10, IntervalHits: []int{h}})
		}
		return r
	}
	base := mk(8, 8, 8, 8, 8, 8, 8, 8)
	r := mk(8, 8, 8, 2, 8, 8, 8, 7)
	spec := RecoverySpec{At: d0.AddDate(0, 0, 3), Window: 3, Tol: 0.05, Intervals: []int{0}, Nominal: []float64{0.8}}
	// Windows ending on days 3..7: (8+8+2)/30 - 0.8 = -0.2 on days 3, 4, 5,
	// then 0, then (8+8+7)/30 - 0.8 = -0.0333.
	got := r.Recovery(0, spec, base)
	if math.Abs(got.Before[0]) > 1e-12 || math.Abs(got.Worst[0]+0.2) > 1e-12 || got.Back[0] != 3 {
		t.Errorf("against base: got %+v, want before 0, worst -0.2, back after 3 days", got)
	}
	got = r.Recovery(0, spec, nil)
	if math.Abs(got.Before[0]-0.8) > 1e-12 || math.Abs(got.Worst[0]-0.6) > 1e-12 || got.Back[0] != 3 {
		t.Errorf("against nominal: got %+v, want before 0.8, worst 0.6, back after 3 days", got)
	}
	// Judged over two days only, the windows never come back.
	spec.Horizon, spec.Tol = 2, 0.01
	if got = r.Recovery(0, spec, nil); got.Back[0] != -1 || math.Abs(got.Worst[0]-0.6) > 1e-12 {
		t.Errorf("two days judged: got %+v, want never back, worst 0.6", got)
	}
}
