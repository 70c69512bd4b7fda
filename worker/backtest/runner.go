// Package backtest replays a history folder through the live worker's site
// actors, on event time and without a bus, and scores every forecast they
// issue against the meter readings: pinball loss, CRPS, coverage, central
// intervals, coverage tests, skill against climatology and trading value,
// for an intraday view (every forecast) and a day-ahead view (forecasts
// issued at one hour of the day, leads under 24 h).
//
// Reference forecasters (climatology and persistence, uncalibrated) always
// run beside the variants asked for, so every number has a yardstick.
package backtest

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"slices"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/worker"
)

// VariantSpec names a forecaster and a calibrator (model.Names,
// conformal.Methods).
type VariantSpec struct {
	Model, Calibrator string
}

func (v VariantSpec) name() string { return v.Model + "+" + v.Calibrator }

// References are the yardsticks every backtest runs.
var References = []VariantSpec{{"climatology", "none"}, {"persistence", "none"}}

// Illustrative imbalance costs (not market data): a shortfall costs more
// than a surplus, as is common where short positions pay the system price.
const (
	DefaultCostShort = 80.0
	DefaultCostLong  = 20.0
)

// Options configures Run. Zero fields take the documented defaults.
type Options struct {
	// Data names the history folder in the report.
	Data string
	// Worker configures the actors (levels, lead buckets, horizon, gamma,
	// ...); its NewForecaster and Calibrator.Method are set per variant.
	Worker worker.Config
	// Variants are scored side by side, the first is the main one; nil
	// means baseline+aci. The References are added unless listed.
	Variants []VariantSpec
	// From and To bound the scored forecasts: issued at or after From, for
	// intervals starting before To. A zero From means the first event plus
	// Warmup (at midnight UTC); a zero To means after the last event.
	From, To time.Time
	// Warmup is the unscored start when From is zero; 0 means 30 days.
	Warmup time.Duration
	// DayAheadHour is the UTC issue hour of the day-ahead view (0..23).
	DayAheadHour int
	// IssueHours, if not nil, replaces DayAheadHour: the day-ahead view
	// keeps the forecasts issued at any of these UTC hours (on the hour),
	// e.g. each run of a weather model issued at 00 and 12 UTC.
	IssueHours []int
	// ViewHorizon bounds the leads of the day-ahead view: [0, ViewHorizon);
	// 0 means 24 h.
	ViewHorizon time.Duration
	// Bands are the lead bands the report breaks scores down by; the zero
	// value means the worker's lead buckets.
	Bands model.Buckets
	// Costs of imbalance; zero Short and Long mean the illustrative defaults.
	Costs Costs
	// FanSite is the site of the fan chart; "" means the first site.
	FanSite string
	// Forecasts, if set, receives the main variant's bundles issued at the
	// SaveHours (UTC, on the hour) within [From, To).
	Forecasts *stream.ForecastFile
	// SaveHours; nil means DayAheadHour only.
	SaveHours []int
	// Progress, if set, is called now and then with events done, the total
	// and the event time reached.
	Progress func(done, total int, at time.Time)
}

// ErrNoData is returned when the selection holds nothing to score.
var ErrNoData = errors.New("backtest: nothing to score")

// scorer scores one (site, variant).
type scorer struct {
	site     string
	seed     uint64
	pending  map[int64][]*row // by target start, unix minutes
	free     []*row
	views    [2][]*acc // [intraday, day-ahead][bucket]
	trades   [2]trade
	weekly   map[time.Time]*acc
	fan      bool // collect the fan chart rows
	fanFrom  time.Time
	fanTo    time.Time
	fanRows  []FanRow
	fanIndex map[int64]int
	raised   map[string]*AlarmCount // by kind
	daily    map[time.Time]*acc     // by UTC day of the interval (intraday view)
	log      []AlarmEvent           // every alarm transition while scored
}

// alarms counts the raised alarms among events at event time t.
func (sc *scorer) alarms(evs []conformal.Event, t, from time.Time) {
	if t.Before(from) {
		return
	}
	for _, e := range evs {
		sc.log = append(sc.log, AlarmEvent{Site: e.Site, Time: e.EventTime, Kind: e.Kind, State: e.State, Level: e.Level, LeadBucket: e.LeadBucket})
		if e.State != conformal.StateRaised {
			continue
		}
		if sc.raised == nil {
			sc.raised = map[string]*AlarmCount{}
		}
		c := sc.raised[e.Kind]
		if c == nil {
			c = &AlarmCount{Site: sc.site, Kind: e.Kind, First: e.EventTime}
			sc.raised[e.Kind] = c
		}
		c.Raised++
	}
}

type row struct {
	minutes  int
	lead     int
	bucket   int
	dayAhead bool
	issued   time.Time
	q        []float64
}

type runner struct {
	o       Options
	cfg     worker.Config
	ivs     []interval
	vars    []VariantSpec
	actors  map[string][]*worker.Actor // by site, one per variant
	scorers map[string][]*scorer
	from    time.Time
	to      time.Time
	saveAt  map[int]bool
	bands   model.Buckets // of the report's breakdown by lead
	fanSite string
	refused int
}

// Run replays h and returns the report.
func Run(ctx context.Context, h *history.History, o Options) (*Report, error) {
	if len(h.Sites) == 0 {
		return nil, fmt.Errorf("%w: no site", ErrNoData)
	}
	if o.IssueHours == nil {
		o.IssueHours = []int{o.DayAheadHour}
	}
	if len(o.IssueHours) == 0 {
		return nil, fmt.Errorf("backtest: no issue hour for the day-ahead view")
	}
	for _, h := range o.IssueHours {
		if h < 0 || h > 23 {
			return nil, fmt.Errorf("backtest: issue hour %d outside 0..23", h)
		}
	}
	o.IssueHours = slices.Clone(o.IssueHours)
	slices.Sort(o.IssueHours)
	o.IssueHours = slices.Compact(o.IssueHours)
	o.DayAheadHour = o.IssueHours[0]
	if o.ViewHorizon <= 0 {
		o.ViewHorizon = 24 * time.Hour
	}
	if o.Costs.Short == 0 && o.Costs.Long == 0 {
		o.Costs.Short, o.Costs.Long = DefaultCostShort, DefaultCostLong
	}
	if o.Costs.Currency == "" {
		o.Costs.Currency = "EUR"
	}
	o.Costs.Illustrative = o.Costs.Short == DefaultCostShort && o.Costs.Long == DefaultCostLong
	if o.Costs.Short <= 0 || o.Costs.Long <= 0 {
		return nil, fmt.Errorf("backtest: imbalance costs must both be positive (short %v, long %v)", o.Costs.Short, o.Costs.Long)
	}
	o.Costs.CriticalLevel = o.Costs.Long / (o.Costs.Short + o.Costs.Long)
	if o.Warmup <= 0 {
		o.Warmup = 30 * 24 * time.Hour
	}
	r := &runner{
		o:       o,
		cfg:     o.Worker.WithDefaults(),
		actors:  map[string][]*worker.Actor{},
		scorers: map[string][]*scorer{},
		saveAt:  map[int]bool{},
	}
	r.bands = o.Bands
	if r.bands.Len() == 0 {
		r.bands = r.cfg.Buckets
	}
	r.ivs = centralIntervals(r.cfg.Levels)
	r.vars = slices.Clone(o.Variants)
	if len(r.vars) == 0 {
		r.vars = []VariantSpec{{"baseline", "aci"}}
	}
	for _, ref := range References {
		if !slices.Contains(r.vars, ref) {
			r.vars = append(r.vars, ref)
		}
	}
	for _, h := range o.SaveHours {
		r.saveAt[h] = true
	}
	if o.SaveHours == nil {
		for _, h := range o.IssueHours {
			r.saveAt[h] = true
		}
	}

	events := h.Events()
	if len(events) == 0 {
		return nil, fmt.Errorf("%w: the history holds no event", ErrNoData)
	}
	r.from, r.to = o.From, o.To
	if r.from.IsZero() {
		r.from = events[0].Time.Add(o.Warmup).Truncate(24 * time.Hour)
	}
	if r.to.IsZero() {
		r.to = events[len(events)-1].Time.Add(time.Nanosecond)
	}
	if !r.from.Before(r.to) {
		return nil, fmt.Errorf("%w: the scored period %s to %s is empty", ErrNoData, r.from.Format(time.RFC3339), r.to.Format(time.RFC3339))
	}
	r.fanSite = o.FanSite
	if r.fanSite == "" {
		r.fanSite = h.Sites[0].ID
	}
	fanTo := weekStart(r.to)
	fanFrom := fanTo.AddDate(0, 0, -7)
	if fanFrom.Before(r.from) {
		fanFrom, fanTo = r.from, r.to
	}
	fanKnown := false
	for _, s := range h.Sites {
		fanKnown = fanKnown || s.ID == r.fanSite
		for vi, v := range r.vars {
			cfg := r.cfg
			cfg.Calibrator.Method = v.Calibrator
			var ferr error
			cfg.NewForecaster = func(s model.Site) model.Forecaster {
				f, err := model.Make(v.Model, s, model.Setup{Buckets: cfg.Buckets, Levels: cfg.Levels})
				ferr = err
				return f
			}
			a, err := worker.NewActor(s, cfg)
			if err == nil {
				err = ferr
			}
			if err != nil {
				return nil, fmt.Errorf("backtest: variant %s: %w", v.name(), err)
			}
			r.actors[s.ID] = append(r.actors[s.ID], a)
			hs := fnv.New64a()
			hs.Write([]byte(s.ID))
			sc := &scorer{site: s.ID, seed: hs.Sum64(), pending: map[int64][]*row{}, weekly: map[time.Time]*acc{}, daily: map[time.Time]*acc{}}
			for k := range sc.views {
				for range r.bands.Len() {
					sc.views[k] = append(sc.views[k], newAcc(len(r.cfg.Levels), len(r.ivs)))
				}
			}
			if vi == 0 && s.ID == r.fanSite {
				sc.fan, sc.fanFrom, sc.fanTo, sc.fanIndex = true, fanFrom, fanTo, map[int64]int{}
			}
			r.scorers[s.ID] = append(r.scorers[s.ID], sc)
		}
	}
	if !fanKnown {
		return nil, fmt.Errorf("backtest: fan chart site %q is not in the history", r.fanSite)
	}

	touched := map[string]bool{}
	var order []string
	lastProgress := 0
	for i := 0; i < len(events); {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		t := events[i].Time
		if !t.Before(r.to.Add(48 * time.Hour)) {
			break // every forecast scored has settled by now
		}
		clear(touched)
		order = order[:0]
		for ; i < len(events) && events[i].Time.Equal(t); i++ {
			ev := &events[i]
			site := ev.Site()
			if !touched[site] {
				touched[site] = true
				order = append(order, site)
			}
			for vi, a := range r.actors[site] {
				var err error
				if ev.Run != nil {
					err = a.Weather(ev.Run)
				} else if !math.IsNaN(ev.Reading.PowerMW) {
					err = a.Meter(ev.Reading)
					if err == nil {
						r.scorers[site][vi].settle(r, ev.Reading)
					}
				}
				if err != nil && vi == 0 {
					r.refused++
				}
			}
		}
		if t.Before(r.to) {
			for _, site := range order {
				for vi, a := range r.actors[site] {
					b := a.Refresh()
					r.scorers[site][vi].alarms(a.Events(), t, r.from)
					if b == nil {
						continue
					}
					r.scorers[site][vi].issue(r, b)
					if vi == 0 && o.Forecasts != nil && r.saved(b) {
						if err := o.Forecasts.Write(b); err != nil {
							return nil, err
						}
					}
				}
			}
		}
		if o.Progress != nil && i-lastProgress >= 4096 {
			o.Progress(i, len(events), t)
			lastProgress = i
		}
		for _, scs := range r.scorers {
			for _, sc := range scs {
				sc.prune(t)
			}
		}
	}
	if o.Progress != nil {
		o.Progress(len(events), len(events), events[len(events)-1].Time)
	}
	return r.report(h), nil
}

func (r *runner) saved(b *model.Bundle) bool {
	t := b.IssuedAt.UTC()
	return r.saveAt[t.Hour()] && t.Minute() == 0 && t.Second() == 0 && !t.Before(r.from) && t.Before(r.to)
}

// issue keeps the scored rows of a new bundle as pending.
func (sc *scorer) issue(r *runner, b *model.Bundle) {
	if b.IssuedAt.Before(r.from) || !b.IssuedAt.Before(r.to) {
		return
	}
	iss := b.IssuedAt.UTC()
	dayAheadIssue := slices.Contains(r.o.IssueHours, iss.Hour()) && iss.Minute() == 0 && iss.Second() == 0
	viewLead := int(r.o.ViewHorizon / time.Minute)
	nl := len(b.Levels)
	for i, s := range b.Steps {
		if !s.ValidStart.Before(r.to) {
			break
		}
		var rw *row
		if k := len(sc.free); k > 0 {
			rw, sc.free = sc.free[k-1], sc.free[:k-1]
		} else {
			rw = &row{q: make([]float64, nl)}
		}
		rw.minutes, rw.lead, rw.issued = s.ValidMinutes, s.LeadMinutes, b.IssuedAt
		rw.bucket = r.bands.Of(s.LeadMinutes)
		rw.dayAhead = dayAheadIssue && s.LeadMinutes < viewLead
		copy(rw.q, b.Row(i))
		key := s.ValidStart.Unix() / 60
		sc.pending[key] = append(sc.pending[key], rw)
		if sc.fan && rw.dayAhead && !s.ValidStart.Before(sc.fanFrom) && s.ValidStart.Before(sc.fanTo) {
			sc.fanIndex[key] = len(sc.fanRows)
			sc.fanRows = append(sc.fanRows, FanRow{ValidStart: s.ValidStart, IssuedAt: b.IssuedAt, Q: slices.Clone(rw.q)})
		}
	}
}

// settle scores every pending row of the reading's interval.
func (sc *scorer) settle(r *runner, rd *model.Reading) {
	key := rd.IntervalStart.Unix() / 60
	rows, ok := sc.pending[key]
	if !ok {
		return
	}
	delete(sc.pending, key)
	y := rd.PowerMW
	levels := r.cfg.Levels
	var wk, dy *acc
	for _, rw := range rows {
		if rw.minutes != rd.IntervalMinutes {
			sc.free = append(sc.free, rw)
			continue
		}
		u := conformal.TieDraw(sc.seed, rd.IntervalStart, rw.lead)
		sc.views[0][rw.bucket].add(levels, rw.q, r.ivs, y, u)
		if !(y == 0 && rw.q[len(rw.q)-1] == 0) { // a certain zero (a PV night) says nothing of coverage
			if dy == nil {
				d := rd.IntervalStart.UTC().Truncate(24 * time.Hour)
				if dy = sc.daily[d]; dy == nil {
					dy = newAcc(len(levels), len(r.ivs))
					sc.daily[d] = dy
				}
			}
			dy.add(levels, rw.q, r.ivs, y, u)
		}
		sc.trades[0].add(levels, rw.q, y, rw.minutes, r.o.Costs)
		if rw.dayAhead {
			sc.views[1][rw.bucket].add(levels, rw.q, r.ivs, y, u)
			sc.trades[1].add(levels, rw.q, y, rw.minutes, r.o.Costs)
		}
		if wk == nil {
			ws := weekStart(rd.IntervalStart)
			if wk = sc.weekly[ws]; wk == nil {
				wk = newAcc(len(levels), 0)
				sc.weekly[ws] = wk
			}
		}
		for j := range levels {
			if conformal.TieHit(levels, rw.q, j, y, u) {
				wk.hits[j]++
			}
		}
		wk.n++
		sc.free = append(sc.free, rw)
	}
	if sc.fan {
		if i, ok := sc.fanIndex[key]; ok {
			sc.fanRows[i].Observed, sc.fanRows[i].HasObserved = y, true
		}
	}
}

// prune drops forecasts whose interval ended two days before t without a
// reading (meter gaps).
func (sc *scorer) prune(t time.Time) {
	if len(sc.pending) < 512 {
		return
	}
	limit := t.Add(-48*time.Hour).Unix() / 60
	for k, rows := range sc.pending {
		if k < limit {
			sc.free = append(sc.free, rows...)
			delete(sc.pending, k)
		}
	}
}

// report assembles the Report from the scorers.
func (r *runner) report(h *history.History) *Report {
	levels := r.cfg.Levels
	nl, nb := len(levels), r.bands.Len()
	rep := &Report{
		Schema: ReportSchema, Data: r.o.Data, From: r.from, To: r.to,
		Levels: levels, DayAheadHour: r.o.DayAheadHour, IssueHours: r.o.IssueHours,
		ViewHorizonMinutes: int(r.o.ViewHorizon / time.Minute), Costs: r.o.Costs,
		Refused: r.refused,
	}
	for b := 0; b < nb; b++ {
		rep.Buckets = append(rep.Buckets, r.bands.Name(b))
	}
	for _, s := range h.Sites {
		rep.Sites = append(rep.Sites, s.ID)
	}
	for vi, v := range r.vars {
		vr := Variant{Name: v.name(), Model: v.Model, Calibrator: v.Calibrator, Reference: slices.Contains(References, v) && vi > 0}
		for k, view := range []*View{&vr.Intraday, &vr.DayAhead} {
			all := newAcc(nl, len(r.ivs))
			byBucket := make([]*acc, nb)
			for b := range byBucket {
				byBucket[b] = newAcc(nl, len(r.ivs))
			}
			for _, site := range rep.Sites {
				sc := r.scorers[site][vi]
				siteAcc := newAcc(nl, len(r.ivs))
				for b, a := range sc.views[k] {
					siteAcc.merge(a)
					byBucket[b].merge(a)
				}
				all.merge(siteAcc)
				view.BySite = append(view.BySite, SiteScores{Site: site, Scores: siteAcc.scores(levels, r.ivs), Trading: sc.trades[k].report()})
			}
			view.All = all.scores(levels, r.ivs)
			for _, a := range byBucket {
				view.ByBucket = append(view.ByBucket, a.scores(levels, r.ivs))
			}
		}
		weeks := map[time.Time]*acc{}
		for _, site := range rep.Sites {
			for ws, a := range r.scorers[site][vi].weekly {
				if weeks[ws] == nil {
					weeks[ws] = newAcc(nl, 0)
				}
				weeks[ws].merge(a)
			}
		}
		for _, ws := range sortedTimes(weeks) {
			a := weeks[ws]
			p := Period{Start: ws, N: a.n, Coverage: make([]float64, nl)}
			for j := range p.Coverage {
				p.Coverage[j] = float64(a.hits[j]) / float64(max(a.n, 1))
			}
			vr.Weekly = append(vr.Weekly, p)
		}
		days := map[time.Time]*acc{}
		for _, site := range rep.Sites {
			sc := r.scorers[site][vi]
			for d, a := range sc.daily {
				if days[d] == nil {
					days[d] = newAcc(nl, len(r.ivs))
				}
				days[d].merge(a)
			}
			vr.AlarmLog = append(vr.AlarmLog, sc.log...)
		}
		for _, d := range sortedTimes(days) {
			a := days[d]
			p := Day{Start: d, N: a.n, Hits: slices.Clone(a.hits), IntervalHits: slices.Clone(a.ivHit)}
			vr.Daily = append(vr.Daily, p)
		}
		slices.SortStableFunc(vr.AlarmLog, func(a, b AlarmEvent) int { return a.Time.Compare(b.Time) })
		for _, site := range rep.Sites {
			sc := r.scorers[site][vi]
			kinds := make([]string, 0, len(sc.raised))
			for k := range sc.raised {
				kinds = append(kinds, k)
			}
			slices.Sort(kinds)
			for _, k := range kinds {
				vr.Alarms = append(vr.Alarms, *sc.raised[k])
			}
		}
		for _, sc := range r.scorers[r.fanSite][vi : vi+1] {
			if sc.fan {
				vr.Fan = &Fan{Site: sc.site, Rows: sc.fanRows}
			}
		}
		rep.Variants = append(rep.Variants, vr)
	}
	r.skill(rep)
	return rep
}

// skill fills Scores.Skill against the climatology variant's scores of the
// same selection.
func (r *runner) skill(rep *Report) {
	ci := slices.IndexFunc(rep.Variants, func(v Variant) bool { return v.Model == "climatology" && v.Calibrator == "none" })
	if ci < 0 {
		return
	}
	set := func(s *Scores, ref Scores) {
		if ref.Pinball > 0 && s.N > 0 {
			s.Skill = 1 - s.Pinball/ref.Pinball
		}
	}
	clim := rep.Variants[ci]
	for vi := range rep.Variants {
		v := &rep.Variants[vi]
		for k, view := range []*View{&v.Intraday, &v.DayAhead} {
			ref := []View{clim.Intraday, clim.DayAhead}[k]
			set(&view.All, ref.All)
			for b := range view.ByBucket {
				set(&view.ByBucket[b], ref.ByBucket[b])
			}
			for s := range view.BySite {
				set(&view.BySite[s].Scores, ref.BySite[s].Scores)
			}
		}
	}
}

func sortedTimes[V any](m map[time.Time]V) []time.Time {
	out := make([]time.Time, 0, len(m))
	for t := range m {
		out = append(out, t)
	}
	slices.SortFunc(out, func(a, b time.Time) int { return a.Compare(b) })
	return out
}
