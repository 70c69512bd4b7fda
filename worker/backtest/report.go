package backtest

import (
	"fmt"
	"strings"
	"time"
)

// ViewLabel describes the day-ahead view, e.g. "issued 00:00 UTC, leads
// under 24 h" or "issued 00:00, 12:00 UTC, leads under 48 h".
func (r *Report) ViewLabel() string {
	hours := r.IssueHours
	if len(hours) == 0 {
		hours = []int{r.DayAheadHour}
	}
	hs := make([]string, len(hours))
	for i, h := range hours {
		hs[i] = fmt.Sprintf("%02d:00", h)
	}
	horizon := r.ViewHorizonMinutes
	if horizon <= 0 {
		horizon = 24 * 60
	}
	lead := fmt.Sprintf("%d h", horizon/60)
	if horizon%60 != 0 {
		lead = fmt.Sprintf("%d min", horizon)
	}
	return fmt.Sprintf("issued %s UTC, leads under %s", strings.Join(hs, ", "), lead)
}

// ReportSchema is the version of the report.json layout.
const ReportSchema = 1

// Report is everything a backtest measured; report.json is its JSON
// encoding and report.html draws it. Levels and lead buckets are listed
// once; every per-level slice follows Levels, every per-bucket slice follows
// Buckets. Numbers that cannot be computed (no forecast scored) are 0 with
// N = 0.
type Report struct {
	Schema int    `json:"schema"`
	Data   string `json:"data"`
	// From and To bound the scored target intervals: [From, To).
	From time.Time `json:"from"`
	To   time.Time `json:"to"`
	// Sites lists the sites scored, in registry order.
	Sites   []string  `json:"sites"`
	Levels  []float64 `json:"levels"`
	Buckets []string  `json:"lead_buckets"`
	// DayAheadHour is the UTC issue hour of the day-ahead view, which keeps
	// forecasts issued at that hour with leads in [0, 24 h).
	DayAheadHour int `json:"day_ahead_issue_hour"`
	// IssueHours are the UTC issue hours the day-ahead view keeps (the
	// first is DayAheadHour), and ViewHorizonMinutes bounds its leads.
	IssueHours         []int `json:"day_ahead_issue_hours"`
	ViewHorizonMinutes int   `json:"day_ahead_horizon_minutes"`
	// Costs are the imbalance prices of the trading-value figures.
	Costs Costs `json:"costs"`
	// Refused counts the inputs the main variant's actors refused (late,
	// duplicate, too far ahead); a clean history gives 0.
	Refused int `json:"refused_inputs"`
	// Variants are the forecasters scored, the main one first, the
	// references (Reference true) last.
	Variants []Variant `json:"variants"`
}

// Costs are linear imbalance costs per MWh.
type Costs struct {
	// Short is the cost of each MWh delivered short of the bid; Long of each
	// MWh delivered beyond it.
	Short float64 `json:"short_per_mwh"`
	Long  float64 `json:"long_per_mwh"`
	// CriticalLevel is Long / (Short + Long), the level of the
	// cost-optimal bid (the newsvendor critical ratio).
	CriticalLevel float64 `json:"critical_level"`
	Currency      string  `json:"currency"`
	// Illustrative is true when the costs are the defaults
	// DefaultCostShort and DefaultCostLong, not market data.
	Illustrative bool `json:"illustrative"`
}

// Variant is one forecaster and calibrator pair.
type Variant struct {
	Name       string `json:"name"` // model+calibrator, e.g. "baseline+aci"
	Model      string `json:"model"`
	Calibrator string `json:"calibrator"`
	Reference  bool   `json:"reference"`
	// Intraday scores every forecast issued; DayAhead only those issued at
	// DayAheadHour with leads under 24 h.
	Intraday View `json:"intraday"`
	DayAhead View `json:"day_ahead"`
	// Weekly is the intraday coverage of each level per calendar week
	// (weeks start on Monday, UTC).
	Weekly []Period `json:"weekly"`
	// Daily counts, per UTC day of the target intervals (intraday view,
	// every site), the outcomes at or below each level's quantile and
	// inside each central interval: enough to follow coverage over any
	// rolling window, e.g. after a change. Forecasts that were certain of
	// a zero that came (every quantile 0: a PV night) are left out: they
	// are always inside and would hide a change in the daylight hours.
	Daily []Day `json:"daily"`
	// AlarmLog is every alarm raise and clear of the variant's actors
	// while scored forecasts were issued, in event-time order.
	AlarmLog []AlarmEvent `json:"alarm_log"`
	// Alarms counts the alarms the variant's actors raised while scored
	// forecasts were issued, per site and kind.
	Alarms []AlarmCount `json:"alarms"`
	// Fan holds the day-ahead forecasts of one site over one week with the
	// outcomes, for the fan chart (main variant only; nil otherwise).
	Fan *Fan `json:"fan,omitempty"`
}

// View is the scores of one selection of forecasts.
type View struct {
	// All pools every site and lead.
	All Scores `json:"all"`
	// ByBucket pools sites, one entry per lead bucket.
	ByBucket []Scores `json:"by_lead_bucket"`
	// BySite pools leads, one entry per site (in Report.Sites order).
	BySite []SiteScores `json:"by_site"`
}

// SiteScores are one site's scores and trading value.
type SiteScores struct {
	Site    string  `json:"site"`
	Scores  Scores  `json:"scores"`
	Trading Trading `json:"trading"`
}

// Scores summarise N scored forecasts (each a bundle row: one interval, all levels).
type Scores struct {
	N int `json:"n"`
	// Pinball is the mean pinball loss over levels and forecasts (MW).
	Pinball float64 `json:"pinball"`
	// PinballByLevel is the mean pinball loss of each level.
	PinballByLevel []float64 `json:"pinball_by_level"`
	// CRPS is approximated as 2 x Pinball (exact as the grid of levels
	// becomes fine and even; METHODS.md section 5).
	CRPS float64 `json:"crps"`
	// Skill is 1 - Pinball / the climatology reference's Pinball on the
	// same selection (0 for the climatology itself, or when unknown).
	Skill float64 `json:"skill_vs_climatology"`
	// Coverage is the share of outcomes at or below each level's quantile.
	Coverage []float64 `json:"coverage"`
	// KupiecP and ChristoffersenP are the p-values of the unconditional
	// coverage and the independence tests of each level (METHODS.md
	// section 5); the independence test runs on the outcomes in the order
	// their intervals were settled, within each site and lead bucket.
	KupiecP         []float64 `json:"kupiec_p"`
	ChristoffersenP []float64 `json:"christoffersen_p"`
	// Intervals are the central prediction intervals whose two levels are
	// on the grid (50 %, 80 %, 90 %).
	Intervals []Interval `json:"intervals"`
}

// Interval summarises one central prediction interval.
type Interval struct {
	Nominal  float64 `json:"nominal"` // 0.5, 0.8, 0.9
	Lower    float64 `json:"lower_level"`
	Upper    float64 `json:"upper_level"`
	Coverage float64 `json:"coverage"`
	Width    float64 `json:"mean_width"` // MW
	// Score is the mean interval (Winkler) score at alpha = 1 - Nominal.
	Score float64 `json:"mean_interval_score"`
}

// Trading is the expected imbalance cost of bidding each forecast's median
// against bidding its quantile at the critical level (interpolated on the
// grid), over the same forecasts, in Costs.Currency.
type Trading struct {
	EnergyMWh   float64 `json:"energy_mwh"` // delivered over the scored intervals
	CostMedian  float64 `json:"cost_median"`
	CostOptimal float64 `json:"cost_optimal"`
	// Saving is 1 - CostOptimal / CostMedian.
	Saving float64 `json:"saving"`
}

// Day is what was scored for the intervals of one UTC day.
type Day struct {
	Start time.Time `json:"start"`
	N     int       `json:"n"`
	// Hits counts outcomes at or below each level's quantile (Report.Levels).
	Hits []int `json:"hits"`
	// IntervalHits counts outcomes inside each central interval, in the
	// order of Scores.Intervals.
	IntervalHits []int `json:"interval_hits"`
}

// AlarmEvent is one alarm transition.
type AlarmEvent struct {
	Site       string    `json:"site"`
	Time       time.Time `json:"time"`
	Kind       string    `json:"kind"`
	State      string    `json:"state"`
	Level      float64   `json:"level,omitempty"`
	LeadBucket string    `json:"lead_bucket,omitempty"`
}

// Period is the coverage of each level over one stretch of time.
type Period struct {
	Start    time.Time `json:"start"`
	N        int       `json:"n"`
	Coverage []float64 `json:"coverage"`
}

// Fan is one week of day-ahead forecasts of one site against the outcomes.
type Fan struct {
	Site string   `json:"site"`
	Rows []FanRow `json:"rows"`
}

// FanRow is one interval of a Fan: its quantiles (Report.Levels) and the
// outcome (NaN-free: Observed is meaningful only when HasObserved).
type FanRow struct {
	ValidStart  time.Time `json:"valid_start"`
	IssuedAt    time.Time `json:"issued_at"`
	Q           []float64 `json:"q"`
	Observed    float64   `json:"observed"`
	HasObserved bool      `json:"has_observed"`
}

// AlarmCount is how often one kind of alarm was raised for one site.
type AlarmCount struct {
	Site   string    `json:"site"`
	Kind   string    `json:"kind"`
	Raised int       `json:"raised"`
	First  time.Time `json:"first_raised"`
}

// Recovery is how central intervals of a variant fared after a change at
// event time, on rolling windows of whole days (Report.Recovery).
type Recovery struct {
	// Before is each interval's rolling coverage (or its difference from
	// the base report's) over the window ending the day before the change;
	// Worst the furthest from nominal (or from zero: a signed difference)
	// of the windows ending on the judged days.
	Before, Worst []float64
	// Back is the number of days after the change from which every judged
	// window was within Tol; -1 if the last one was not.
	Back []int
}

// RecoverySpec says what Report.Recovery measures.
type RecoverySpec struct {
	// At is the change (event time); the first judged window ends on its
	// UTC day.
	At time.Time
	// Window is the length of the rolling windows in days; Horizon the
	// number of days judged from the change on (0: to the end of the data).
	Window, Horizon int
	// Tol is how far a window may be from nominal (or from the base's).
	Tol float64
	// Intervals picks central intervals by index in Scores.Intervals, and
	// Nominal gives their nominal coverage.
	Intervals []int
	Nominal   []float64
}

// Recovery measures a variant's central intervals (Variants[vi], the
// intraday view, from the daily counts) around a change: the coverage over
// rolling windows against nominal, or, with base (a report of the same
// history without the change, with the same variants) not nil, each
// window's coverage less the same window's in base; days base lacks are
// skipped.
func (r *Report) Recovery(vi int, s RecoverySpec, base *Report) Recovery {
	days := r.Variants[vi].Daily
	var ref []Day
	if base != nil {
		byDay := make(map[time.Time]Day, len(base.Variants[vi].Daily))
		for _, d := range base.Variants[vi].Daily {
			byDay[d.Start] = d
		}
		var mine []Day
		for _, d := range days {
			if b, ok := byDay[d.Start]; ok {
				mine, ref = append(mine, d), append(ref, b)
			}
		}
		days = mine
	}
	cov := func(ds []Day, end, k int) float64 { // window of days ending at index end (inclusive)
		n, hits := 0, 0
		for d := max(0, end-s.Window+1); d <= end; d++ {
			n += ds[d].N
			hits += ds[d].IntervalHits[s.Intervals[k]]
		}
		return float64(hits) / float64(max(n, 1))
	}
	// off is window i's coverage less its reference: nominal, or base's.
	off := func(i, k int) float64 {
		if ref != nil {
			return cov(days, i, k) - cov(ref, i, k)
		}
		return cov(days, i, k) - s.Nominal[k]
	}
	change := s.At.UTC().Truncate(24 * time.Hour)
	first, last := len(days), len(days)
	for i, d := range days {
		if first == len(days) && !d.Start.Before(change) {
			first = i
		}
		if s.Horizon > 0 && !d.Start.Before(change.AddDate(0, 0, s.Horizon)) {
			last = i
			break
		}
	}
	n := len(s.Intervals)
	rec := Recovery{Before: make([]float64, n), Worst: make([]float64, n), Back: make([]int, n)}
	for k := range s.Intervals {
		rec.Back[k] = -1
		if first > 0 {
			rec.Before[k] = off(first-1, k)
		}
		worst, good := 0.0, -1 // good: first day index from which every window is within Tol
		for i := first; i < last; i++ {
			d := off(i, k)
			if d*d > worst*worst {
				worst = d
			}
			switch {
			case d < -s.Tol || d > s.Tol:
				good = -1
			case good < 0:
				good = i
			}
		}
		rec.Worst[k] = worst
		if ref == nil {
			rec.Before[k] += s.Nominal[k]
			rec.Worst[k] += s.Nominal[k]
		}
		if good >= 0 {
			rec.Back[k] = int(days[good].Start.Sub(change) / (24 * time.Hour))
		}
	}
	return rec
}
