package synth

import (
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"time"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/solar"
	"github.com/plumb-forecast/plumb/stream/history"
)

// Defaults of FleetOptions.
const (
	DefaultSeed        = 1
	DefaultDays        = 28
	DefaultStepMinutes = 15
	DefaultFaultSite   = "pv-heron-flats"
	// MaxDays bounds FleetOptions.Days (the truth is held in memory minute
	// by minute).
	MaxDays = 366
)

// DefaultStart is the default first meter interval: 2026-03-02T00:00:00Z.
func DefaultStart() time.Time { return time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC) }

// FleetOptions configures Fleet. The zero value gives the default demo.
type FleetOptions struct {
	// Seed seeds every random draw; 0 means DefaultSeed (1).
	Seed int64
	// Start is the start of the first meter interval, a whole minute; zero
	// means DefaultStart (2026-03-02T00:00:00Z).
	Start time.Time
	// Days is the length of the meter record; 0 means DefaultDays (28), at
	// most MaxDays.
	Days int
	// StepMinutes is the meter interval; 0 means DefaultStepMinutes (15). It
	// must divide 60.
	StepMinutes int
	// FaultSite is the site whose output drops; "" means DefaultFaultSite.
	FaultSite string
	// FaultFrom is when the fault starts; zero means half way through the
	// meter record.
	FaultFrom time.Time
	// FaultFactor multiplies the fault site's output from FaultFrom on; 0
	// means 2/3 (output falls by a third). It must be in (0, 1]; 1 gives a
	// fleet without a fault.
	FaultFactor float64
}

// ErrOptions is wrapped by the errors of FleetOptions.Validate.
var ErrOptions = errors.New("synth: bad fleet options")

func (o FleetOptions) withDefaults() FleetOptions {
	if o.Seed == 0 {
		o.Seed = DefaultSeed
	}
	if o.Start.IsZero() {
		o.Start = DefaultStart()
	}
	o.Start = o.Start.UTC()
	if o.Days == 0 {
		o.Days = DefaultDays
	}
	if o.StepMinutes == 0 {
		o.StepMinutes = DefaultStepMinutes
	}
	if o.FaultSite == "" {
		o.FaultSite = DefaultFaultSite
	}
	if o.FaultFrom.IsZero() {
		o.FaultFrom = o.Start.Add(time.Duration(o.Days) * 12 * time.Hour)
	}
	if o.FaultFactor == 0 {
		o.FaultFactor = 2.0 / 3
	}
	return o
}

// FaultInfo says which site the fleet's injected fault hits, from when, and
// by what factor its output is multiplied.
type FaultInfo struct {
	Site   string
	From   time.Time
	Factor float64
}

// Fault returns the fault Fleet(o) injects, defaults applied.
func (o FleetOptions) Fault() FaultInfo {
	d := o.withDefaults()
	return FaultInfo{Site: d.FaultSite, From: d.FaultFrom, Factor: d.FaultFactor}
}

// Validate reports whether Fleet accepts o; use it on options that come
// from a user.
func (o FleetOptions) Validate() error {
	d := o.withDefaults()
	switch {
	case d.Days < 0 || d.Days > MaxDays:
		return fmt.Errorf("%w: days %d outside [1, %d]", ErrOptions, o.Days, MaxDays)
	case d.StepMinutes < 0 || 60%d.StepMinutes != 0:
		return fmt.Errorf("%w: step %d minutes does not divide an hour", ErrOptions, o.StepMinutes)
	case !d.Start.Truncate(time.Minute).Equal(d.Start):
		return fmt.Errorf("%w: start %s is not a whole minute", ErrOptions, d.Start.Format(time.RFC3339Nano))
	case !(d.FaultFactor > 0 && d.FaultFactor <= 1):
		return fmt.Errorf("%w: fault factor %v outside (0, 1]", ErrOptions, o.FaultFactor)
	}
	for _, s := range specs() {
		if s.id == d.FaultSite {
			return nil
		}
	}
	return fmt.Errorf("%w: fault site %q is not in the fleet", ErrOptions, o.FaultSite)
}

// Fleet generates the demo fleet: its sites, weather runs and meter readings
// (see the package doc), sorted as history.Load returns them. It panics if
// o is invalid (see Validate).
func Fleet(o FleetOptions) *history.History {
	if err := o.Validate(); err != nil {
		panic(err.Error())
	}
	w := simulate(o.withDefaults())
	h := &history.History{Sites: Sites(), Runs: w.runs(), Readings: w.readings()}
	h.Sort()
	return h
}

// Sites returns the fleet's site registry (a fresh copy).
func Sites() []model.Site {
	sp := specs()
	sites := make([]model.Site, len(sp))
	for i, s := range sp {
		lat, lon, elev := s.lat, s.lon, s.elev
		sites[i] = model.Site{
			ID: s.id, Kind: s.kind, CapacityMW: s.capMW,
			Lat: &lat, Lon: &lon, ElevationM: &elev,
			Note: "invented demo site",
		}
		if s.kind == model.KindWind {
			hub := s.hub
			sites[i].HubHeightM = &hub
		}
	}
	return sites
}

// siteSpec is one invented plant and the parameters of its simulation.
type siteSpec struct {
	id             string
	kind           model.Kind
	capMW          float64
	lat, lon, elev float64
	hub            float64 // wind: hub height, m
	weibullScale   float64 // wind: m/s at hub height
}

func specs() []siteSpec {
	return []siteSpec{
		{id: "pv-heron-flats", kind: model.KindPV, capMW: 40, lat: 44.12, lon: -30.31, elev: 35},
		{id: "pv-saltcombe", kind: model.KindPV, capMW: 25, lat: 43.91, lon: -29.87, elev: 12},
		{id: "pv-brindle", kind: model.KindPV, capMW: 12, lat: 44.27, lon: -30.05, elev: 80},
		{id: "wind-gorse-hill", kind: model.KindWind, capMW: 60, lat: 44.2, lon: -30.42, elev: 210, hub: 90, weibullScale: 8.3},
		{id: "wind-tallow-ridge", kind: model.KindWind, capMW: 45, lat: 44.03, lon: -30.18, elev: 160, hub: 100, weibullScale: 7.9},
		{id: "wind-ketch-bank", kind: model.KindWind, capMW: 30, lat: 43.86, lon: -30.33, elev: 5, hub: 80, weibullScale: 8.9},
	}
}

// Simulation constants (see the package doc).
const (
	runEveryHours  = 6
	runLeadHours   = 48
	weibullShape   = 2.1
	cutIn, rated   = 3.0, 12.0
	cutOut         = 25.0
	farmSpread     = 0.08
	pvDerate       = 0.86
	pvTempCoeff    = -0.0035 // per C of cell temperature above 25 C
	meterNoise     = 0.004   // share of capacity
	errCorrHours   = 8.0     // correlation time of forecast errors along a run
	errCommonShare = 0.7     // share of forecast error variance common to all sites
)

// errSpread returns the spread (standard deviation) of a variable's
// forecast error at lead 0 and at lead runLeadHours; it is linear between.
func errSpread(v int) (atZero, atEnd float64) {
	switch v {
	case varK:
		return 0.05, 0.22
	case varWind:
		return 0.6, 2.5
	case varDir:
		return 6, 26
	case varTemp:
		return 0.4, 1.6
	default: // varPressure
		return 0.4, 3
	}
}

// Forecast error processes.
const (
	varK = iota
	varWind
	varDir
	varTemp
	varPressure
	nErrVars
)

// newRand returns the generator of one named process.
func newRand(seed int64, process string) *rand.Rand {
	h := fnv.New64a()
	h.Write([]byte(process))
	return rand.New(rand.NewPCG(uint64(seed), h.Sum64()))
}

// ar1 fills dst with a stationary Gaussian AR(1) series of unit variance
// whose lag-one correlation is exp(-1/tau), tau in steps.
func ar1(dst []float64, tau float64, r *rand.Rand) {
	phi := math.Exp(-1 / tau)
	s := math.Sqrt(1 - phi*phi)
	x := r.NormFloat64()
	for i := range dst {
		dst[i] = x
		x = phi*x + s*r.NormFloat64()
	}
}

// smooth fills dst with a stationary Gaussian process of unit variance that
// is smooth at short time scales: an AR(1) series (lag-one correlation
// phi = exp(-1/tau), tau in steps) passed through the exponential filter
// y[t] = phi y[t-1] + (1 - phi) x[t], whose variance (1 + phi^2)/(1 + phi)^2
// is scaled back to one. Its autocorrelation falls to 1/e after about
// 2.15 tau. The first 10 tau steps are dropped so that it starts stationary.
func smooth(dst []float64, tau float64, r *rand.Rand) {
	phi := math.Exp(-1 / tau)
	s := math.Sqrt(1 - phi*phi)
	scale := (1 + phi) / math.Sqrt(1+phi*phi)
	x := r.NormFloat64()
	y := x
	for i := -int(10 * tau); i < len(dst); i++ {
		x = phi*x + s*r.NormFloat64()
		y = phi*y + (1-phi)*x
		if i >= 0 {
			dst[i] = scale * y
		}
	}
}

// siteTruth is one site's simulated truth, one value a minute.
type siteTruth struct {
	spec  siteSpec
	power []float64 // MW, fault included
	temp  []float64 // C
	// PV
	ghi, ghiClear, k []float64
	// wind
	wind, dir, pressure []float64
}

// world is the simulated truth of the fleet.
type world struct {
	o       FleetOptions
	minutes int // simulated span from o.Start
	sites   []siteTruth
}

func (w *world) at(m int) time.Time { return w.o.Start.Add(time.Duration(m) * time.Minute) }

// simulate runs the truth over the meter record plus the lead of the last run.
func simulate(o FleetOptions) *world {
	w := &world{o: o, minutes: (o.Days*24 + runLeadHours) * 60}
	n := w.minutes

	// Regional processes.
	kMean, kSD := cloudRegimes(n, newRand(o.Seed, "cloud-regimes"))
	cloudCommon := make([]float64, n)
	ar1(cloudCommon, 90, newRand(o.Seed, "cloud-common"))
	tempSynoptic := make([]float64, n)
	smooth(tempSynoptic, 16*60, newRand(o.Seed, "temp-synoptic"))
	windSynoptic := make([]float64, n)
	smooth(windSynoptic, 14*60, newRand(o.Seed, "wind-synoptic"))
	dirSlow := make([]float64, n)
	smooth(dirSlow, 18*60, newRand(o.Seed, "wind-direction"))
	pressureSlow := make([]float64, n)
	smooth(pressureSlow, 28*60, newRand(o.Seed, "pressure"))

	local := make([]float64, n)
	for _, sp := range specs() {
		st := siteTruth{spec: sp, power: make([]float64, n), temp: make([]float64, n)}
		for m := range n {
			t := w.at(m)
			solarHour := float64(t.Hour()) + float64(t.Minute())/60 + sp.lon/15
			diurnal := math.Cos(2 * math.Pi * (solarHour - 14.5) / 24)
			st.temp[m] = 13.5 - 0.0065*sp.elev + 1.6*tempSynoptic[m] + 1.8*(0.3+0.7*kMean[m])*diurnal
		}
		switch sp.kind {
		case model.KindPV:
			st.ghi, st.ghiClear, st.k = make([]float64, n), make([]float64, n), make([]float64, n)
			ar1(local, 20, newRand(o.Seed, "cloud-local/"+sp.id))
			for m := range n {
				z := math.Sqrt(0.6)*cloudCommon[m] + math.Sqrt(0.4)*local[m]
				k := clamp(kMean[m]+kSD[m]*z, 0.03, 1.08)
				zen, _ := solar.Position(w.at(m).Add(30*time.Second), sp.lat, sp.lon)
				cs := solar.Haurwitz(zen)
				g := k * cs
				cell := st.temp[m] + g*25/800
				p := sp.capMW * g / 1000 * pvDerate * (1 + pvTempCoeff*(cell-25))
				st.k[m], st.ghiClear[m], st.ghi[m] = k, cs, g
				st.power[m] = clamp(p, 0, sp.capMW)
			}
		case model.KindWind:
			st.wind, st.dir, st.pressure = make([]float64, n), make([]float64, n), make([]float64, n)
			smooth(local, 90, newRand(o.Seed, "wind-local/"+sp.id))
			dirLocal := make([]float64, n)
			smooth(dirLocal, 60, newRand(o.Seed, "wind-direction-local/"+sp.id))
			const wSyn = 0.93
			wLoc := math.Sqrt(1 - wSyn*wSyn)
			for m := range n {
				t := w.at(m)
				z := wSyn*windSynoptic[m] + wLoc*local[m]
				solarHour := float64(t.Hour()) + float64(t.Minute())/60 + sp.lon/15
				v := weibull(z, sp.weibullScale, weibullShape) * (1 + 0.06*math.Cos(2*math.Pi*(solarHour-15)/24))
				st.wind[m] = v
				st.dir[m] = math.Mod(245+40*dirSlow[m]+15*windSynoptic[m]+6*dirLocal[m]+720, 360)
				st.pressure[m] = (1014 - 10*windSynoptic[m] - 5*pressureSlow[m]) * math.Exp(-sp.elev/8434)
				st.power[m] = sp.capMW * farmCurve(v)
			}
		}
		if sp.id == o.FaultSite {
			faultFrom := int(math.Ceil(o.FaultFrom.Sub(o.Start).Minutes()))
			for m := max(faultFrom, 0); m < n; m++ {
				st.power[m] *= o.FaultFactor
			}
		}
		w.sites = append(w.sites, st)
	}
	return w
}

// cloudRegimes returns the blended mean and spread of the clear-sky index,
// minute by minute: regimes of 1.5 to 4.5 days, each unlike the one before,
// blended with a six-hour exponential filter.
func cloudRegimes(n int, r *rand.Rand) (mean, sd []float64) {
	type regime struct{ p, mean, sd float64 }
	regimes := []regime{
		{0.35, 0.93, 0.05}, // clear
		{0.40, 0.62, 0.22}, // broken clouds
		{0.25, 0.30, 0.12}, // overcast
	}
	mean, sd = make([]float64, n), make([]float64, n)
	prev := -1
	for m := 0; m < n; {
		i := prev
		for i == prev {
			u, acc := r.Float64(), 0.0
			for i = range regimes {
				acc += regimes[i].p
				if u < acc {
					break
				}
			}
		}
		prev = i
		length := int((1.5 + 3*r.Float64()) * 1440)
		for end := min(m+length, n); m < end; m++ {
			mean[m], sd[m] = regimes[i].mean, regimes[i].sd
		}
	}
	a := 1 - math.Exp(-1.0/360)
	for m := 1; m < n; m++ {
		mean[m] = mean[m-1] + a*(mean[m]-mean[m-1])
		sd[m] = sd[m-1] + a*(sd[m]-sd[m-1])
	}
	return mean, sd
}

// weibull maps a standard normal z to the Weibull distribution with the
// given scale and shape by matching quantiles.
func weibull(z, scale, shape float64) float64 {
	upper := 0.5 * math.Erfc(z/math.Sqrt2) // P(Z > z), accurate in the far tail
	if upper <= 0 {
		upper = math.SmallestNonzeroFloat64
	}
	return scale * math.Pow(-math.Log(upper), 1/shape)
}

// turbineCurve is the per-unit output of one turbine at speed v (m/s): zero
// below cut-in and from cut-out on, (v^3 - cutIn^3)/(rated^3 - cutIn^3)
// between cut-in and rated, 1 from rated to cut-out.
func turbineCurve(v float64) float64 {
	switch {
	case v < cutIn || v >= cutOut:
		return 0
	case v >= rated:
		return 1
	}
	return (v*v*v - cutIn*cutIn*cutIn) / (rated*rated*rated - cutIn*cutIn*cutIn)
}

// farmCurve is the per-unit output of a farm whose turbines see speeds
// spread by farmSpread around v: the three-point Gauss-Hermite mean of the
// turbine curve.
func farmCurve(v float64) float64 {
	s := math.Sqrt(3) * farmSpread * v
	return (turbineCurve(v-s) + 4*turbineCurve(v) + turbineCurve(v+s)) / 6
}

// kastenInverse returns the cloud fraction c whose clear-sky index is k
// under Kasten and Czeplak's k = 1 - 0.75 c^3.4.
func kastenInverse(k float64) float64 {
	return clamp(math.Pow(clamp((1-k)/0.75, 0, 1), 1/3.4), 0, 1)
}

func clamp(x, lo, hi float64) float64 { return math.Max(lo, math.Min(hi, x)) }

// round rounds x to d decimals, never giving -0.
func round(x float64, d int) float64 {
	p := math.Pow10(d)
	r := math.Round(x*p) / p
	if r == 0 {
		return 0
	}
	return r
}

// readings returns the meter readings, interval by interval.
func (w *world) readings() []model.Reading {
	r := newRand(w.o.Seed, "meter")
	step := w.o.StepMinutes
	steps := w.o.Days * 24 * 60 / step
	out := make([]model.Reading, 0, steps*len(w.sites))
	for i := range steps {
		for s := range w.sites {
			st := &w.sites[s]
			sum := 0.0
			for m := i * step; m < (i+1)*step; m++ {
				sum += st.power[m]
			}
			p := sum / float64(step)
			noise := r.NormFloat64() * meterNoise * st.spec.capMW
			if p > 0 {
				p = clamp(p+noise, 0, st.spec.capMW)
			}
			out = append(out, model.Reading{
				Site: st.spec.id, IntervalStart: w.at(i * step), IntervalMinutes: step,
				PowerMW: round(p, 3), Availability: 1,
			})
		}
	}
	return out
}

// hourly holds a site's truth averaged over one hour.
type hourly struct {
	k, ghiClear, temp, wind, dir, pressure float64
}

// hour averages the truth over the hour starting at minute m0.
func (st *siteTruth) hour(m0 int) hourly {
	var a hourly
	var sumGHI, sumLatentK, dx, dy float64
	for m := m0; m < m0+60; m++ {
		a.temp += st.temp[m]
		if st.spec.kind == model.KindPV {
			sumGHI += st.ghi[m]
			a.ghiClear += st.ghiClear[m]
			sumLatentK += st.k[m]
		} else {
			a.wind += st.wind[m]
			a.pressure += st.pressure[m]
			dx += math.Sin(st.dir[m] * math.Pi / 180)
			dy += math.Cos(st.dir[m] * math.Pi / 180)
		}
	}
	a.temp /= 60
	a.wind /= 60
	a.pressure /= 60
	a.ghiClear /= 60
	a.dir = math.Mod(math.Atan2(dx, dy)*180/math.Pi+360, 360)
	// The clear-sky index of the hour: irradiance-weighted by day, the
	// latent cloudiness at night.
	a.k = sumLatentK / 60
	if a.ghiClear > 1 {
		a.k = sumGHI / 60 / a.ghiClear
	}
	return a
}

// runs returns the weather runs, issue time by issue time.
func (w *world) runs() []model.WeatherRun {
	r := newRand(w.o.Seed, "forecast-errors")
	end := w.o.Start.Add(time.Duration(w.o.Days) * 24 * time.Hour)
	const every = runEveryHours * time.Hour
	first := w.o.Start.Truncate(every) // Truncate works in absolute time: UTC 00/06/12/18
	if first.Before(w.o.Start) {
		first = first.Add(every)
	}
	common := make([][]float64, nErrVars)
	site := make([][]float64, nErrVars)
	for v := range nErrVars {
		common[v] = make([]float64, runLeadHours)
		site[v] = make([]float64, runLeadHours)
	}
	var out []model.WeatherRun
	for issued := first; issued.Before(end); issued = issued.Add(every) {
		for v := range nErrVars {
			ar1(common[v], errCorrHours, r)
		}
		base := int(issued.Sub(w.o.Start) / time.Minute)
		for s := range w.sites {
			st := &w.sites[s]
			for v := range nErrVars {
				ar1(site[v], errCorrHours, r)
			}
			errAt := func(v, lead int) float64 {
				lo, hi := errSpread(v)
				spread := lo + (hi-lo)*(float64(lead)+0.5)/runLeadHours
				return spread * (math.Sqrt(errCommonShare)*common[v][lead] + math.Sqrt(1-errCommonShare)*site[v][lead])
			}
			run := model.WeatherRun{Site: st.spec.id, IssuedAt: issued}
			if st.spec.kind == model.KindPV {
				run.Vars = []string{"cloud_frac", "ghi_wm2", "temp_c"}
			} else {
				run.Vars = []string{"pressure_hpa", "temp_c", "wind_dir_deg", "wind_ms"}
			}
			run.Rows = make([]model.WeatherRow, runLeadHours)
			values := make([]float64, runLeadHours*len(run.Vars))
			for lead := range runLeadHours {
				a := st.hour(base + 60*lead)
				vals := values[lead*len(run.Vars) : (lead+1)*len(run.Vars) : (lead+1)*len(run.Vars)]
				temp := round(a.temp+errAt(varTemp, lead), 2)
				if st.spec.kind == model.KindPV {
					k := clamp(a.k+errAt(varK, lead), 0.03, 1.08)
					vals[0] = round(kastenInverse(k), 3)
					vals[1] = round(k*a.ghiClear, 1)
					vals[2] = temp
				} else {
					vals[0] = round(a.pressure+errAt(varPressure, lead), 1)
					vals[1] = temp
					vals[2] = round(math.Mod(a.dir+errAt(varDir, lead)+720, 360), 1)
					vals[3] = round(math.Max(0, a.wind+errAt(varWind, lead)), 2)
				}
				run.Rows[lead] = model.WeatherRow{
					ValidStart: issued.Add(time.Duration(lead) * time.Hour), ValidMinutes: 60, Values: vals,
				}
			}
			out = append(out, run)
		}
	}
	return out
}
