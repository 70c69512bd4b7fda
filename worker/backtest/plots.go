package backtest

import (
	"bytes"
	"fmt"
	"html"
	"html/template"
	"image/color"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"
)

// The figures of report.html. Each builder returns the figure, or nil and a
// sentence saying why there is nothing to draw; none of them panics on a
// Report with missing or short slices.

// svgFigure is one plot ready to draw, with its legend drawn to the right of
// the plotting area (or inside it, when legend is nil and the plot has its
// own).
type svgFigure struct {
	plot          *plot.Plot
	legend        *plot.Legend
	width, height vg.Length
}

// svgLegendMax is the longest legend text kept; longer names are shortened.
const svgLegendMax = 30

// draw draws the figure on dc.
func (f *svgFigure) draw(dc draw.Canvas) {
	if f.legend == nil {
		f.plot.Draw(dc)
		return
	}
	pad := vg.Points(10)
	lw := f.legend.Rectangle(dc).Size().X + pad
	if total := dc.Max.X - dc.Min.X; lw > total/2 {
		lw = total / 2
	}
	f.plot.Draw(draw.Crop(dc, 0, -lw, 0, 0))
	if f.plot.Title.Text != "" {
		f.legend.YOffs = -f.plot.Title.TextStyle.Rectangle(f.plot.Title.Text).Size().Y - f.plot.Title.Padding
	}
	f.legend.Draw(draw.Crop(dc, dc.Max.X-dc.Min.X-lw+pad, 0, 0, 0))
}

// svg draws the figure as an inline SVG element (no XML prelude), labelled
// for screen readers with label. A panic of the plotting library (which
// panics on some degenerate drawings) is returned as an error: a report
// must not crash a backtest that took hours.
func (f *svgFigure) svg(label string) (out template.HTML, err error) {
	defer func() {
		if p := recover(); p != nil {
			err = fmt.Errorf("draw %q: %v", label, p)
		}
	}()
	c := vgsvg.New(f.width, f.height)
	f.draw(draw.New(c))
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return "", fmt.Errorf("draw %q: %w", label, err)
	}
	s := buf.String()
	i := strings.Index(s, "<svg")
	if i < 0 {
		return "", fmt.Errorf("draw %q: no svg element in the drawing", label)
	}
	s = s[i:]
	// The fonts are not embedded (that would add hundreds of kB per plot);
	// give the browser fallbacks with the same metrics class.
	s = strings.ReplaceAll(s, "font-family:Liberation Sans;", "font-family:Liberation Sans,Arial,Helvetica,sans-serif;")
	s = strings.Replace(s, "<svg ", `<svg role="img" aria-label="`+html.EscapeString(label)+`" `, 1)
	return template.HTML(s), nil // #nosec: drawn by vgsvg, which escapes every text.
}

// svgNewPlot returns a plot with sans-serif text, the given title and axis
// labels.
func svgNewPlot(title, xLabel, yLabel string) *plot.Plot {
	p := plot.New()
	p.Title.Text = title
	p.Title.TextStyle.Font.Variant = "Sans"
	p.Title.TextStyle.Font.Size = vg.Points(11)
	p.Title.Padding = vg.Points(6)
	p.X.Label.Text = xLabel
	p.Y.Label.Text = yLabel
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		a.Label.TextStyle.Font.Variant = "Sans"
		a.Label.TextStyle.Font.Size = vg.Points(10)
		a.Tick.Label.Font.Variant = "Sans"
		a.Tick.Label.Font.Size = vg.Points(9)
	}
	p.Legend.TextStyle.Font.Variant = "Sans"
	p.Legend.TextStyle.Font.Size = vg.Points(9)
	p.X.Tick.Marker = svgNumTicks{}
	p.Y.Tick.Marker = svgNumTicks{}
	return p
}

// svgNewLegend returns an empty legend for the right of a figure.
func svgNewLegend() *plot.Legend {
	l := plot.NewLegend()
	l.TextStyle.Font.Variant = "Sans"
	l.TextStyle.Font.Size = vg.Points(9)
	l.Top = true
	l.Left = true
	l.ThumbnailWidth = vg.Points(18)
	l.Padding = vg.Points(2)
	return &l
}

// svgLegendText shortens s to svgLegendMax characters.
func svgLegendText(s string) string {
	r := []rune(s)
	if len(r) <= svgLegendMax {
		return s
	}
	return string(r[:svgLegendMax-1]) + "…"
}

// svgColor is the i-th colour of a palette that stays distinct for readers
// with the common colour-vision deficiencies (Okabe and Ito).
func svgColor(i int) color.RGBA {
	p := [...]color.RGBA{
		{0x00, 0x72, 0xB2, 0xFF}, // blue
		{0xD5, 0x5E, 0x00, 0xFF}, // vermillion
		{0x00, 0x9E, 0x73, 0xFF}, // bluish green
		{0xCC, 0x79, 0xA7, 0xFF}, // reddish purple
		{0xE6, 0x9F, 0x00, 0xFF}, // orange
		{0x56, 0xB4, 0xE9, 0xFF}, // sky blue
		{0x00, 0x00, 0x00, 0xFF}, // black
	}
	if i < 0 {
		i = -i
	}
	return p[i%len(p)]
}

// svgFade returns c with opacity a (0..1), premultiplied as color.RGBA wants.
func svgFade(c color.RGBA, a float64) color.RGBA {
	return color.RGBA{
		R: uint8(float64(c.R) * a), G: uint8(float64(c.G) * a), B: uint8(float64(c.B) * a),
		A: uint8(255 * a),
	}
}

// svgVariantStyle is the line of variant i: the main variant (i = 0) thick,
// references dashed.
func svgVariantStyle(i int, v *Variant) draw.LineStyle {
	s := draw.LineStyle{Color: svgColor(i), Width: vg.Points(1.3)}
	if i == 0 {
		s.Width = vg.Points(2.2)
	}
	if v.Reference {
		s.Dashes = []vg.Length{vg.Points(5), vg.Points(3)}
	}
	return s
}

// svgDashed is the style of target and reference lines.
func svgDashed(c color.Color) draw.LineStyle {
	return draw.LineStyle{Color: c, Width: vg.Points(1), Dashes: []vg.Length{vg.Points(4), vg.Points(3)}}
}

// svgFinite reports whether every x is a finite number.
func svgFinite(xs ...float64) bool {
	for _, x := range xs {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return false
		}
	}
	return true
}

// svgAt returns s[i] when i is in range and s[i] is finite.
func svgAt(s []float64, i int) (float64, bool) {
	if i < 0 || i >= len(s) || !svgFinite(s[i]) {
		return 0, false
	}
	return s[i], true
}

// svgClosestLevel is the index of the level closest to target (the lower
// one on a tie), or -1 when there are no finite levels.
func svgClosestLevel(levels []float64, target float64) int {
	best, dist := -1, math.Inf(1)
	for i, l := range levels {
		if !svgFinite(l) {
			continue
		}
		if d := math.Abs(l - target); d < dist {
			best, dist = i, d
		}
	}
	return best
}

// svgLevelsNear returns the distinct indices of the levels closest to each
// target, in target order.
func svgLevelsNear(levels []float64, targets ...float64) []int {
	var out []int
	for _, t := range targets {
		i := svgClosestLevel(levels, t)
		if i < 0 {
			continue
		}
		dup := false
		for _, j := range out {
			dup = dup || j == i
		}
		if !dup {
			out = append(out, i)
		}
	}
	return out
}

// svgSame reports whether two levels or nominal coverages are the same
// grid point.
func svgSame(a, b float64) bool { return math.Abs(a-b) < 1e-6 }

// svgLevelLabel formats a level as a percentage: 0.1 gives "10 %".
func svgLevelLabel(l float64) string {
	return fmt.Sprintf("%s\u00a0%%", svgTrim(l*100))
}

// svgTrim formats x with at most 4 decimals and no trailing zeros.
func svgTrim(x float64) string {
	s := fmt.Sprintf("%.4f", x)
	s = strings.TrimRight(s, "0")
	return strings.TrimSuffix(s, ".")
}

// svgUnix is t as float seconds since the Unix epoch (the x of time axes).
func svgUnix(t time.Time) float64 { return float64(t.Unix()) }

// svgReliability draws observed coverage against level for every variant
// with scored forecasts in the intraday (or day-ahead) view.
func svgReliability(r *Report, dayAhead bool) (*svgFigure, string) {
	view := "intraday"
	title := "Intraday view"
	if dayAhead {
		view = "day-ahead"
		title = "Day-ahead view (" + r.ViewLabel() + ")"
	}
	p := svgNewPlot(title, "Level (quantile probability)", "Observed coverage")
	p.X.Min, p.X.Max, p.Y.Min, p.Y.Max = 0, 1, 0, 1
	p.Legend.Top, p.Legend.Left = true, true
	p.Legend.XOffs = vg.Points(6)
	p.Legend.YOffs = vg.Points(-4)
	p.Legend.Padding = vg.Points(1.5)
	diag, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 0}, {X: 1, Y: 1}})
	if err != nil {
		return nil, "The reliability diagram could not be drawn: " + err.Error()
	}
	diag.LineStyle = svgDashed(color.Gray{Y: 120})
	p.Add(diag)
	p.Legend.Add("calibrated", diag)
	drawn := 0
	for i := range r.Variants {
		v := &r.Variants[i]
		s := v.Intraday.All
		if dayAhead {
			s = v.DayAhead.All
		}
		if s.N <= 0 {
			continue
		}
		var xys plotter.XYs
		for j, l := range r.Levels {
			c, ok := svgAt(s.Coverage, j)
			if ok && svgFinite(l) {
				xys = append(xys, plotter.XY{X: l, Y: c})
			}
		}
		if len(xys) == 0 {
			continue
		}
		line, err := plotter.NewLine(xys)
		if err != nil {
			continue
		}
		line.LineStyle = svgVariantStyle(i, v)
		p.Add(line)
		thumbs := []plot.Thumbnailer{line}
		if len(xys) <= 25 {
			pts, err := plotter.NewScatter(xys)
			if err == nil {
				pts.GlyphStyle = draw.GlyphStyle{Color: svgColor(i), Radius: vg.Points(2), Shape: draw.CircleGlyph{}}
				p.Add(pts)
				thumbs = append(thumbs, pts)
			}
		}
		p.Legend.Add(svgLegendText(v.Name), thumbs...)
		drawn++
	}
	if drawn == 0 {
		return nil, fmt.Sprintf("No %s forecasts were scored, so there is no %s reliability diagram.", view, view)
	}
	return &svgFigure{plot: p, width: 4.6 * vg.Inch, height: 4.4 * vg.Inch}, ""
}

// svgPITBar is one bar of a PIT histogram drawn from coverage: the share of
// outcomes between two consecutive levels, drawn with height Share / (Hi - Lo).
type svgPITBar struct {
	Lo, Hi, Share, Height float64
}

// svgPITBars turns the coverage of increasing levels into PIT bars, with 0
// and 1 at the ends: the shares are the differences of cumulative coverage.
// It returns nil when levels are not increasing inside (0, 1) or a coverage
// is missing.
func svgPITBars(levels, coverage []float64) []svgPITBar {
	if len(levels) == 0 || len(coverage) < len(levels) {
		return nil
	}
	edges := make([]float64, 0, len(levels)+2)
	cum := make([]float64, 0, len(levels)+2)
	edges, cum = append(edges, 0), append(cum, 0)
	for i, l := range levels {
		c := coverage[i]
		if !svgFinite(l, c) || l <= edges[len(edges)-1] || l >= 1 {
			return nil
		}
		edges, cum = append(edges, l), append(cum, c)
	}
	edges, cum = append(edges, 1), append(cum, 1)
	bars := make([]svgPITBar, len(edges)-1)
	for i := range bars {
		w := edges[i+1] - edges[i]
		sh := cum[i+1] - cum[i]
		bars[i] = svgPITBar{Lo: edges[i], Hi: edges[i+1], Share: sh, Height: sh / w}
	}
	return bars
}

// svgPIT draws the PIT histogram of the main variant's intraday view.
func svgPIT(r *Report) (*svgFigure, string) {
	if len(r.Variants) == 0 {
		return nil, "No variant was scored, so there is no PIT histogram."
	}
	v := &r.Variants[0]
	s := v.Intraday.All
	if s.N <= 0 {
		return nil, "The main variant has no scored intraday forecasts, so there is no PIT histogram."
	}
	bars := svgPITBars(r.Levels, s.Coverage)
	if bars == nil {
		return nil, "The PIT histogram needs increasing levels inside (0, 1) and a coverage for each; this report lacks them."
	}
	p := svgNewPlot(fmt.Sprintf("PIT histogram: %s, intraday (N = %d)", svgLegendText(v.Name), s.N),
		"Level (PIT value)", "Density (share / level gap)")
	p.X.Min, p.X.Max = 0, 1
	lo, hi := 0.0, 1.0
	rings := make([]plotter.XYer, 0, len(bars))
	for _, b := range bars {
		lo, hi = math.Min(lo, b.Height), math.Max(hi, b.Height)
		rings = append(rings, plotter.XYs{{X: b.Lo, Y: 0}, {X: b.Hi, Y: 0}, {X: b.Hi, Y: b.Height}, {X: b.Lo, Y: b.Height}})
	}
	p.Y.Min, p.Y.Max = lo, hi*1.08
	poly, err := plotter.NewPolygon(rings...)
	if err != nil {
		return nil, "The PIT histogram could not be drawn: " + err.Error()
	}
	poly.Color = svgFade(svgColor(0), 0.55)
	poly.LineStyle = draw.LineStyle{Color: color.White, Width: vg.Points(0.4)}
	p.Add(poly)
	flat, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 1}, {X: 1, Y: 1}})
	if err != nil {
		return nil, "The PIT histogram could not be drawn: " + err.Error()
	}
	flat.LineStyle = svgDashed(svgColor(1))
	flat.LineStyle.Width = vg.Points(1.5)
	p.Add(flat)
	l := svgNewLegend()
	l.Add("observed", poly)
	l.Add("calibrated (flat)", flat)
	return &svgFigure{plot: p, legend: l, width: 7.5 * vg.Inch, height: 3.4 * vg.Inch}, ""
}

// svgRuns splits 0..n-1 into runs of consecutive usable points: ok says
// whether point i is usable, and a gap in x larger than maxGap (when > 0)
// also breaks a run.
func svgRuns(n int, ok func(i int) bool, x func(i int) float64, maxGap float64) [][]int {
	var runs [][]int
	var cur []int
	for i := range n {
		if !ok(i) {
			if len(cur) > 0 {
				runs, cur = append(runs, cur), nil
			}
			continue
		}
		if len(cur) > 0 && maxGap > 0 && x(i)-x(cur[len(cur)-1]) > maxGap {
			runs, cur = append(runs, cur), nil
		}
		cur = append(cur, i)
	}
	if len(cur) > 0 {
		runs = append(runs, cur)
	}
	return runs
}

// svgBinomialBand is the band tau +- 2 sqrt(tau (1 - tau) / n), the spread
// of the observed coverage of n independent outcomes of a calibrated
// forecast, clipped to [0, 1].
func svgBinomialBand(tau float64, n int) (lo, hi float64) {
	if n <= 0 {
		return 0, 1
	}
	se := math.Sqrt(tau * (1 - tau) / float64(n))
	return math.Max(0, tau-2*se), math.Min(1, tau+2*se)
}

// svgWeekly draws the weekly intraday coverage of the main variant at the
// levels closest to 0.1, 0.5 and 0.9, with their targets and binomial bands.
func svgWeekly(r *Report) (*svgFigure, string) {
	if len(r.Variants) == 0 {
		return nil, "No variant was scored, so there is no coverage over time."
	}
	v := &r.Variants[0]
	weeks := make([]Period, len(v.Weekly))
	copy(weeks, v.Weekly)
	sort.SliceStable(weeks, func(i, j int) bool { return weeks[i].Start.Before(weeks[j].Start) })
	idx := svgLevelsNear(r.Levels, 0.1, 0.5, 0.9)
	if len(weeks) == 0 || len(idx) == 0 {
		return nil, "The main variant has no weekly coverage, so there is no coverage over time."
	}
	p := svgNewPlot(fmt.Sprintf("Weekly coverage: %s, intraday", svgLegendText(v.Name)), "Week starting (UTC)", "Observed coverage")
	p.Y.Min, p.Y.Max = 0, 1
	p.X.Tick.Marker = svgTimeTicks{}
	x := func(i int) float64 { return svgUnix(weeks[i].Start) }
	l := svgNewLegend()
	xmin, xmax, drawn := math.Inf(1), math.Inf(-1), 0
	var bandThumb, targetThumb plot.Thumbnailer
	for k, li := range idx {
		tau := r.Levels[li]
		col := svgColor(k)
		ok := func(i int) bool {
			_, has := svgAt(weeks[i].Coverage, li)
			return has && weeks[i].N > 0
		}
		runs := svgRuns(len(weeks), ok, x, 8*24*3600)
		var thumb plot.Thumbnailer
		for _, run := range runs {
			line := make(plotter.XYs, len(run))
			band := make(plotter.XYs, 0, 2*len(run))
			for j, i := range run {
				c, _ := svgAt(weeks[i].Coverage, li)
				line[j] = plotter.XY{X: x(i), Y: c}
				_, hi := svgBinomialBand(tau, weeks[i].N)
				band = append(band, plotter.XY{X: x(i), Y: hi})
				xmin, xmax = math.Min(xmin, x(i)), math.Max(xmax, x(i))
			}
			for j := len(run) - 1; j >= 0; j-- {
				lo, _ := svgBinomialBand(tau, weeks[run[j]].N)
				band = append(band, plotter.XY{X: x(run[j]), Y: lo})
			}
			if len(run) > 1 {
				poly, err := plotter.NewPolygon(band)
				if err == nil {
					poly.Color = svgFade(col, 0.18)
					poly.LineStyle.Width = 0
					p.Add(poly)
					bandThumb = &plotter.Polygon{Color: svgFade(color.RGBA{0x70, 0x70, 0x70, 0xFF}, 0.3)}
				}
			}
			ln, err := plotter.NewLine(line)
			if err != nil {
				continue
			}
			ln.LineStyle = draw.LineStyle{Color: col, Width: vg.Points(1.4)}
			p.Add(ln)
			thumb = ln
			if len(run) == 1 {
				pts, err := plotter.NewScatter(line)
				if err == nil {
					pts.GlyphStyle = draw.GlyphStyle{Color: col, Radius: vg.Points(1.8), Shape: draw.CircleGlyph{}}
					p.Add(pts)
				}
			}
		}
		if thumb != nil {
			l.Add("level "+svgLevelLabel(tau), thumb)
			drawn++
		}
	}
	if drawn == 0 {
		return nil, "No week holds a scored forecast of the main variant, so there is no coverage over time."
	}
	if xmax <= xmin {
		xmin, xmax = xmin-3.5*24*3600, xmax+3.5*24*3600
	}
	for k, li := range idx {
		tgt, err := plotter.NewLine(plotter.XYs{{X: xmin, Y: r.Levels[li]}, {X: xmax, Y: r.Levels[li]}})
		if err != nil {
			continue
		}
		tgt.LineStyle = svgDashed(svgColor(k))
		p.Add(tgt)
		targetThumb = &plotter.Line{LineStyle: svgDashed(color.Gray{Y: 90})}
	}
	if targetThumb != nil {
		l.Add("target (the level)", targetThumb)
	}
	if bandThumb != nil {
		l.Add("±2 binomial s.e.", bandThumb)
	}
	p.X.Min, p.X.Max = xmin, xmax
	return &svgFigure{plot: p, legend: l, width: 7.5 * vg.Inch, height: 3.8 * vg.Inch}, ""
}

// svgPickInterval returns the nominal coverage to show: want when some
// scores hold that interval, else the widest one held, else 0.
func svgPickInterval(want float64, scores ...[]Interval) float64 {
	widest := 0.0
	for _, s := range scores {
		for _, iv := range s {
			if svgSame(iv.Nominal, want) {
				return want
			}
			if svgFinite(iv.Nominal) && iv.Nominal > widest && iv.Nominal < 1 {
				widest = iv.Nominal
			}
		}
	}
	return widest
}

// svgInterval returns the interval of s with the given nominal coverage.
func svgInterval(s Scores, nominal float64) (Interval, bool) {
	for _, iv := range s.Intervals {
		if svgSame(iv.Nominal, nominal) {
			return iv, true
		}
	}
	return Interval{}, false
}

// svgBucketNames returns one label per lead bucket: Report.Buckets, padded
// when a view holds more buckets than names.
func svgBucketNames(r *Report, n int) []string {
	names := make([]string, n)
	for i := range names {
		if i < len(r.Buckets) && r.Buckets[i] != "" {
			names[i] = r.Buckets[i]
		} else {
			names[i] = fmt.Sprintf("bucket %d", i+1)
		}
	}
	return names
}

// svgWidthByLead draws the mean width of the 80 % central interval (or the
// widest held) per lead bucket of every variant's intraday view.
func svgWidthByLead(r *Report) (*svgFigure, string) {
	var all [][]Interval
	n := 0
	for i := range r.Variants {
		for _, b := range r.Variants[i].Intraday.ByBucket {
			all = append(all, b.Intervals)
		}
		n = max(n, len(r.Variants[i].Intraday.ByBucket))
	}
	nominal := svgPickInterval(0.8, all...)
	if n == 0 || nominal == 0 {
		return nil, "No lead bucket holds a central interval, so there is no width-by-lead plot."
	}
	names := svgBucketNames(r, n)
	p := svgNewPlot(fmt.Sprintf("Mean width of the %s central interval by lead (intraday)", svgLevelLabel(nominal)),
		"Lead bucket", "Mean width (MW)")
	p.NominalX(names...)
	p.X.Min, p.X.Max = -0.5, float64(n)-0.5
	p.Y.Min = 0
	l := svgNewLegend()
	drawn := 0
	for i := range r.Variants {
		v := &r.Variants[i]
		var xys plotter.XYs
		for b, s := range v.Intraday.ByBucket {
			iv, ok := svgInterval(s, nominal)
			if ok && s.N > 0 && svgFinite(iv.Width) {
				xys = append(xys, plotter.XY{X: float64(b), Y: iv.Width})
			}
		}
		if len(xys) == 0 {
			continue
		}
		line, pts, err := plotter.NewLinePoints(xys)
		if err != nil {
			continue
		}
		line.LineStyle = svgVariantStyle(i, v)
		pts.GlyphStyle = draw.GlyphStyle{Color: svgColor(i), Radius: vg.Points(2.2), Shape: draw.CircleGlyph{}}
		p.Add(line, pts)
		l.Add(svgLegendText(v.Name), line, pts)
		drawn++
	}
	if drawn == 0 {
		return nil, "No lead bucket holds a scored forecast, so there is no width-by-lead plot."
	}
	return &svgFigure{plot: p, legend: l, width: 7.5 * vg.Inch, height: 3.6 * vg.Inch}, ""
}

// svgPair is a central interval on the grid: levels lo and hi = 1 - lo.
type svgPair struct {
	Lo, Hi  int
	Nominal float64
}

// svgFanPairs picks the central intervals of the fan chart: the 90, 80 and
// 50 % pairs when the grid holds any of them, else up to three pairs spread
// over those it holds; widest first.
func svgFanPairs(levels []float64) []svgPair {
	var pairs []svgPair
	for i, lo := range levels {
		if !svgFinite(lo) || lo <= 0 || lo >= 0.5 || svgSame(lo, 0.5) {
			continue
		}
		for j, hi := range levels {
			if svgSame(lo+hi, 1) {
				pairs = append(pairs, svgPair{Lo: i, Hi: j, Nominal: hi - lo})
				break
			}
		}
	}
	sort.SliceStable(pairs, func(a, b int) bool { return pairs[a].Nominal > pairs[b].Nominal })
	var want []svgPair
	for _, nom := range []float64{0.9, 0.8, 0.5} {
		for _, pr := range pairs {
			if svgSame(pr.Nominal, nom) {
				want = append(want, pr)
				break
			}
		}
	}
	if len(want) > 0 || len(pairs) <= 3 {
		if len(want) == 0 {
			return pairs
		}
		return want
	}
	return []svgPair{pairs[0], pairs[len(pairs)/2], pairs[len(pairs)-1]}
}

// svgFan draws the main variant's fan chart: shaded central intervals, the
// median and the observed outcomes over time.
func svgFan(r *Report) (*svgFigure, string) {
	if len(r.Variants) == 0 || r.Variants[0].Fan == nil || len(r.Variants[0].Fan.Rows) == 0 {
		return nil, "The main variant carries no fan data, so there is no fan chart."
	}
	v := &r.Variants[0]
	rows := make([]FanRow, len(v.Fan.Rows))
	copy(rows, v.Fan.Rows)
	sort.SliceStable(rows, func(i, j int) bool { return rows[i].ValidStart.Before(rows[j].ValidStart) })
	pairs := svgFanPairs(r.Levels)
	med := svgClosestLevel(r.Levels, 0.5)
	if med < 0 {
		return nil, "The report lists no levels, so there is no fan chart."
	}
	x := func(i int) float64 { return svgUnix(rows[i].ValidStart) }
	step := math.Inf(1)
	for i := 1; i < len(rows); i++ {
		if d := x(i) - x(i-1); d > 0 && d < step {
			step = d
		}
	}
	if math.IsInf(step, 1) {
		step = 3600
	}
	title := fmt.Sprintf("Day-ahead fan chart: %s, site %s", svgLegendText(v.Name), svgLegendText(v.Fan.Site))
	p := svgNewPlot(title, "Valid time (UTC)", "Power (MW)")
	p.X.Tick.Marker = svgTimeTicks{}
	l := svgNewLegend()
	ymin, ymax := 0.0, math.Inf(-1)
	shades := []color.RGBA{{0xD6, 0xE6, 0xF4, 0xFF}, {0xA9, 0xCB, 0xE6, 0xFF}, {0x6F, 0xA7, 0xD4, 0xFF}}
	for k, pr := range pairs {
		ok := func(i int) bool {
			a, okA := svgAt(rows[i].Q, pr.Lo)
			b, okB := svgAt(rows[i].Q, pr.Hi)
			return okA && okB && svgFinite(a, b)
		}
		var poly *plotter.Polygon
		for _, run := range svgRuns(len(rows), ok, x, 1.5*step) {
			if len(run) < 2 {
				continue
			}
			ring := make(plotter.XYs, 0, 2*len(run))
			for _, i := range run {
				ring = append(ring, plotter.XY{X: x(i), Y: rows[i].Q[pr.Hi]})
			}
			for j := len(run) - 1; j >= 0; j-- {
				ring = append(ring, plotter.XY{X: x(run[j]), Y: rows[run[j]].Q[pr.Lo]})
			}
			for _, pt := range ring {
				ymin, ymax = math.Min(ymin, pt.Y), math.Max(ymax, pt.Y)
			}
			pg, err := plotter.NewPolygon(ring)
			if err != nil {
				continue
			}
			pg.Color = shades[min(k, len(shades)-1)]
			pg.LineStyle.Width = 0
			p.Add(pg)
			poly = pg
		}
		if poly != nil {
			l.Add(fmt.Sprintf("%s–%s", svgTrim(r.Levels[pr.Lo]*100), svgLevelLabel(r.Levels[pr.Hi])), poly)
		}
	}
	var medThumb plot.Thumbnailer
	medOK := func(i int) bool { _, ok := svgAt(rows[i].Q, med); return ok }
	for _, run := range svgRuns(len(rows), medOK, x, 1.5*step) {
		xys := make(plotter.XYs, len(run))
		for j, i := range run {
			xys[j] = plotter.XY{X: x(i), Y: rows[i].Q[med]}
			ymin, ymax = math.Min(ymin, xys[j].Y), math.Max(ymax, xys[j].Y)
		}
		ln, err := plotter.NewLine(xys)
		if err != nil {
			continue
		}
		ln.LineStyle = draw.LineStyle{Color: color.RGBA{0x08, 0x30, 0x6B, 0xFF}, Width: vg.Points(1.4)}
		p.Add(ln)
		medThumb = ln
	}
	if medThumb != nil {
		name := "median"
		if !svgSame(r.Levels[med], 0.5) {
			name = "level " + svgLevelLabel(r.Levels[med])
		}
		l.Add(name, medThumb)
	}
	var obs plotter.XYs
	for i, row := range rows {
		if row.HasObserved && svgFinite(row.Observed) {
			obs = append(obs, plotter.XY{X: x(i), Y: row.Observed})
			ymin, ymax = math.Min(ymin, row.Observed), math.Max(ymax, row.Observed)
		}
	}
	if len(obs) > 0 {
		sc, err := plotter.NewScatter(obs)
		if err == nil {
			sc.GlyphStyle = draw.GlyphStyle{Color: color.Black, Radius: vg.Points(1.4), Shape: draw.CircleGlyph{}}
			p.Add(sc)
			l.Add("observed", sc)
		}
	}
	if math.IsInf(ymax, -1) {
		return nil, "The fan data hold no finite quantile or outcome, so there is no fan chart."
	}
	if ymax <= ymin {
		ymax = ymin + 1
	}
	p.Y.Min, p.Y.Max = ymin, ymax+0.04*(ymax-ymin)
	p.X.Min, p.X.Max = x(0), x(len(rows)-1)+step
	return &svgFigure{plot: p, legend: l, width: 7.5 * vg.Inch, height: 3.8 * vg.Inch}, ""
}

// svgTimeTicks marks a time axis (Unix seconds, UTC) at calendar steps
// chosen for the span: hours, days, weeks, months, quarters or years.
type svgTimeTicks struct{}

// Ticks implements plot.Ticker.
func (svgTimeTicks) Ticks(lo, hi float64) []plot.Tick {
	if !svgFinite(lo, hi) || hi <= lo {
		return nil
	}
	t0 := time.Unix(int64(math.Floor(lo)), 0).UTC()
	t1 := time.Unix(int64(math.Ceil(hi)), 0).UTC()
	day := 24 * time.Hour
	span := t1.Sub(t0)
	midnight := time.Date(t0.Year(), t0.Month(), t0.Day(), 0, 0, 0, 0, time.UTC)
	monthStart := time.Date(t0.Year(), t0.Month(), 1, 0, 0, 0, 0, time.UTC)
	var (
		major, minor func(time.Time) time.Time
		start        time.Time
		format       string
		majorOK      = func(time.Time) bool { return true }
	)
	switch {
	case span <= 2*day:
		start, format = midnight, "02 Jan 15:04"
		major = func(t time.Time) time.Time { return t.Add(6 * time.Hour) }
		minor = func(t time.Time) time.Time { return t.Add(time.Hour) }
	case span <= 9*day:
		start, format = midnight, "Mon 02 Jan"
		major = func(t time.Time) time.Time { return t.AddDate(0, 0, 1) }
		minor = func(t time.Time) time.Time { return t.Add(6 * time.Hour) }
	case span <= 120*day:
		start = midnight.AddDate(0, 0, -((int(midnight.Weekday()) + 6) % 7)) // Monday
		format = "02 Jan"
		major = func(t time.Time) time.Time { return t.AddDate(0, 0, 7) }
		minor = func(t time.Time) time.Time { return t.AddDate(0, 0, 1) }
	case span <= 400*day:
		start, format = monthStart, "Jan 2006"
		major = func(t time.Time) time.Time { return t.AddDate(0, 1, 0) }
		minor = func(t time.Time) time.Time { return t.AddDate(0, 0, 7) }
		majorOK = func(t time.Time) bool { return span <= 200*day || t.Month()%2 == 1 }
	case span <= 4*366*day:
		start, format = monthStart, "Jan 2006"
		major = func(t time.Time) time.Time { return t.AddDate(0, 1, 0) }
		minor = major
		majorOK = func(t time.Time) bool { return t.Month()%3 == 1 }
	default:
		start, format = time.Date(t0.Year(), 1, 1, 0, 0, 0, 0, time.UTC), "2006"
		major = func(t time.Time) time.Time { return t.AddDate(1, 0, 0) }
		minor = func(t time.Time) time.Time { return t.AddDate(0, 3, 0) }
	}
	var ticks []plot.Tick
	for t := start; !t.After(t1); t = major(t) {
		if majorOK(t) {
			if !t.Before(t0) {
				ticks = append(ticks, plot.Tick{Value: svgUnix(t), Label: t.Format(format)})
			}
		} else if !t.Before(t0) {
			ticks = append(ticks, plot.Tick{Value: svgUnix(t)})
		}
		next := major(t)
		for m := minor(t); m.Before(next) && !m.After(t1); m = minor(m) {
			if !m.Before(t0) {
				ticks = append(ticks, plot.Tick{Value: svgUnix(m)})
			}
		}
		if len(ticks) > 2000 {
			break
		}
	}
	return ticks
}

// svgNumTicks marks a numeric axis at about five round steps (1, 2, 2.5 or
// 5 times a power of ten) with minor ticks between, all labels with the
// decimals the step needs.
type svgNumTicks struct{}

// Ticks implements plot.Ticker.
func (svgNumTicks) Ticks(lo, hi float64) []plot.Tick {
	if !svgFinite(lo, hi) || hi <= lo {
		return nil
	}
	raw := (hi - lo) / 5
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step, parts := 10*mag, 5
	for _, m := range []struct {
		mult  float64
		parts int
	}{{1, 5}, {2, 4}, {2.5, 5}, {5, 5}} {
		if m.mult*mag >= raw*(1-1e-9) {
			step, parts = m.mult*mag, m.parts
			break
		}
	}
	minor := step / float64(parts)
	decimals := max(0, -int(math.Floor(math.Log10(step)+1e-9)))
	if svgSame(step/math.Pow(10, math.Floor(math.Log10(step)+1e-9)), 2.5) {
		decimals++
	}
	var ticks []plot.Tick
	for k := math.Ceil(lo/minor - 1e-9); k*minor <= hi+minor*1e-9; k++ {
		v := k * minor
		t := plot.Tick{Value: v}
		if q := v / step; math.Abs(q-math.Round(q)) < 1e-6 {
			v = math.Round(q) * step
			t.Value = v
			t.Label = strconv.FormatFloat(v, 'f', decimals, 64)
			if strings.Trim(t.Label, "-0.") == "" {
				t.Label = strings.TrimPrefix(t.Label, "-")
			}
		}
		ticks = append(ticks, t)
	}
	return ticks
}
