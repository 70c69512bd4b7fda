package worker

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"hash"
	"hash/crc32"
	"math"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// input is one input of a feed: a weather run or a reading.
type input struct {
	run     *model.WeatherRun
	reading *model.Reading
}

// inputs flattens a feed into the order play applies it: before each
// reading, the runs issued by its end.
func inputs(f feed) []input {
	var in []input
	ri := 0
	for k := range f.readings {
		r := &f.readings[k]
		for ri < len(f.runs) && !f.runs[ri].IssuedAt.After(r.End()) {
			in = append(in, input{run: &f.runs[ri]})
			ri++
		}
		in = append(in, input{reading: r})
	}
	return in
}

// apply applies one input to a, as the pool does (a refresh after it),
// and returns the SHA-256 of all it gave: the refusal's text, the alarm
// events queued, and the bundle.
func apply(t *testing.T, a *Actor, in input) [sha256.Size]byte {
	t.Helper()
	sum, _ := applyCount(t, a, in)
	return sum
}

// applyCount is apply, also returning how many alarm events the input
// gave.
func applyCount(t *testing.T, a *Actor, in input) (sum [sha256.Size]byte, events int) {
	t.Helper()
	h := sha256.New()
	var err error
	if in.run != nil {
		err = a.Weather(in.run)
	} else {
		err = a.Meter(in.reading)
	}
	if err != nil {
		if !errors.Is(err, ErrDuplicate) && !errors.Is(err, ErrTooLate) && !errors.Is(err, ErrTooFarAhead) {
			t.Fatal(err)
		}
		fmt.Fprintf(h, "refused %v\n", err)
	}
	evs := a.Events()
	for _, e := range evs {
		fmt.Fprintf(h, "event %s %s %s %x %s %x %x %d %x %d %s\n", e.Site, e.Kind, e.State, math.Float64bits(e.Level),
			e.LeadBucket, math.Float64bits(e.Target), math.Float64bits(e.Observed), e.Window,
			math.Float64bits(e.PValue), e.EventTime.UnixNano(), e.Reason)
	}
	hashBundle(h, a.Refresh())
	return [sha256.Size]byte(h.Sum(nil)), len(evs)
}

// hashBundle writes every field of a bundle to h, floats bit for bit.
func hashBundle(h hash.Hash, b *model.Bundle) {
	if b == nil {
		h.Write([]byte("no bundle\n"))
		return
	}
	fmt.Fprintf(h, "bundle %s %d %d %s %s %d %d\n", b.Site, b.IssuedAt.UnixNano(), b.Watermark.UnixNano(), b.Model,
		b.Calibrator, b.WeatherIssuedAt.UnixNano(), len(b.Steps))
	var buf []byte
	for _, v := range slices.Concat([]float64{b.CapacityMW, b.Availability}, b.Levels, b.Q, b.Expected) {
		buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(v))
	}
	for _, s := range b.Steps {
		buf = binary.LittleEndian.AppendUint64(buf, uint64(s.ValidStart.UnixNano()))
		buf = binary.LittleEndian.AppendUint64(buf, uint64(s.ValidMinutes))
		buf = binary.LittleEndian.AppendUint64(buf, uint64(s.LeadMinutes))
	}
	h.Write(buf)
}

// snapConfig is the default Config with the named forecaster (model.Make,
// default options) and calibrator method.
func snapConfig(t testing.TB, forecaster, method string) Config {
	cfg := Config{Calibrator: conformal.Options{Method: method}}.WithDefaults()
	cfg.NewForecaster = func(s model.Site) model.Forecaster {
		f, err := model.Make(forecaster, s, model.Setup{Buckets: cfg.Buckets, Levels: cfg.Levels})
		if err != nil {
			t.Fatal(err)
		}
		return f
	}
	return cfg
}

// snapshot returns a's snapshot at seq, failing t on error.
func snapshot(t testing.TB, a *Actor, seq uint64) []byte {
	t.Helper()
	data, err := a.Snapshot(seq)
	if err != nil {
		t.Fatal(err)
	}
	return data
}

// strayRuns counts the runs pending forecasts hold rows of that a no
// longer keeps.
func strayRuns(a *Actor) int {
	kept := map[*model.WeatherRun]bool{}
	for _, r := range a.runs {
		kept[r.WeatherRun] = true
	}
	stray := map[*model.WeatherRun]bool{}
	for _, tg := range a.pending.vals {
		for _, rec := range tg.rec {
			if rec != noRec {
				if px, _, _ := a.record(rec); px.run != nil && !kept[px.run] {
					stray[px.run] = true
				}
			}
		}
	}
	return len(stray)
}

// TestSnapshotRestoreIdentical: for every forecaster and calibrator, an
// actor restored from a snapshot taken at several points (early, with
// forecasts pending for runs it no longer keeps, with alarms queued or
// raised where the feed raises them, and for the Stack with a forest in
// use and another being grown) gives, fed the same later inputs, the same
// refusals, alarm events and bundles (every field, quantiles bit for bit)
// as the actor it was taken from, and the same snapshot bytes at the end.
// The feed is variedFeed (invented data with gaps, duplicates, late,
// curtailed and missing readings).
func TestSnapshotRestoreIdentical(t *testing.T) {
	sites := testSites()
	wind, pv := sites[1], sites[0]
	type tc struct {
		site              model.Site
		forecaster, cal   string
		days              int
		wantFlight        bool
		forkEvery, window int // inputs between fixed snapshots; inputs a restored actor is played
	}
	days, window := 9, 400
	if testing.Short() {
		days, window = 7, 150
	}
	methods := conformal.Methods()
	if testing.Short() {
		methods = []string{conformal.MethodACI, conformal.MethodDtACI}
	}
	var cases []tc
	for _, name := range model.Names() {
		for _, m := range methods {
			cases = append(cases, tc{wind, name, m, days, name == "stack" && !testing.Short(), 0, window})
		}
		cases = append(cases, tc{pv, name, conformal.MethodACI, 4, false, 0, window})
	}
	for _, c := range cases {
		t.Run(fmt.Sprintf("%s/%s/%s", c.site.ID, c.forecaster, c.cal), func(t *testing.T) {
			cfg := snapConfig(t, c.forecaster, c.cal)
			in := inputs(variedFeed(c.site, c.days, 7))
			ref, err := NewActor(c.site, cfg)
			if err != nil {
				t.Fatal(err)
			}
			type fork struct {
				at   int
				data []byte
				why  string
			}
			var forks []fork
			ends := map[int][]byte{} // the reference's snapshot where a fork's play ends
			sums := make([][sha256.Size]byte, len(in))
			fixed := []int{0, len(in) / 4, len(in) / 2, 3 * len(in) / 4, len(in) - 2}
			stray, flight := false, false
			events := 0
			for i := range in {
				var n int
				sums[i], n = applyCount(t, ref, in[i])
				events += n
				if d, ok := ends[i]; ok && d == nil {
					ends[i] = snapshot(t, ref, uint64(i))
				}
				why := ""
				if slices.Contains(fixed, i) {
					why = "fixed"
				}
				if !stray && i > len(in)/8 && len(ref.pending.keys) > 0 && strayRuns(ref) > 0 {
					why, stray = "pending forecasts of runs no longer kept", true
				}
				if st, ok := ref.fc.(*model.Stack); ok && !flight {
					if n, _ := st.Fits(); n > 0 && st.Fitting() {
						why, flight = "a forest in use and one being grown", true
					}
				}
				if why == "" {
					continue
				}
				forks = append(forks, fork{i, snapshot(t, ref, uint64(i)), why})
				end := min(i+c.window, len(in)-1)
				if _, ok := ends[end]; !ok {
					ends[end] = nil
				}
				if end == i {
					ends[end] = snapshot(t, ref, uint64(i))
				}
			}
			if !stray {
				t.Error("no snapshot with pending forecasts of runs no longer kept")
			}
			if c.wantFlight && !flight {
				t.Error("no snapshot with a forest in use and one being grown")
			}
			for _, fk := range forks {
				a, seq, err := RestoreActor(c.site, cfg, fk.data)
				if err != nil {
					t.Fatalf("snapshot after input %d (%s): %v", fk.at, fk.why, err)
				}
				if seq != uint64(fk.at) {
					t.Fatalf("snapshot after input %d: sequence %d", fk.at, seq)
				}
				if again := snapshot(t, a, seq); !bytes.Equal(again, fk.data) {
					t.Fatalf("snapshot after input %d (%s): the restored actor's snapshot differs", fk.at, fk.why)
				}
				end := min(fk.at+c.window, len(in)-1)
				for j := fk.at + 1; j <= end; j++ {
					if got := apply(t, a, in[j]); got != sums[j] {
						t.Fatalf("snapshot after input %d (%s): input %d gives other outputs", fk.at, fk.why, j)
					}
				}
				if !bytes.Equal(snapshot(t, a, uint64(end)), ends[end]) {
					t.Fatalf("snapshot after input %d (%s): snapshots after input %d differ", fk.at, fk.why, end)
				}
			}
			t.Logf("%d inputs, %d alarm events, %d snapshots restored; last snapshot %d bytes", len(in), events, len(forks), len(forks[len(forks)-1].data))
		})
	}
}

// TestSnapshotDeterministic: two actors fed the same inputs give the same
// snapshot bytes, and taking snapshots changes nothing an actor gives.
func TestSnapshotDeterministic(t *testing.T) {
	site := testSites()[1]
	in := inputs(variedFeed(site, 3, 21))
	for _, name := range []string{"baseline", "stack"} {
		t.Run(name, func(t *testing.T) {
			cfg := snapConfig(t, name, conformal.MethodSplit)
			a, err := NewActor(site, cfg)
			if err != nil {
				t.Fatal(err)
			}
			b, err := NewActor(site, cfg)
			if err != nil {
				t.Fatal(err)
			}
			for i := range in {
				sa := snapshot(t, a, uint64(i))
				if i%50 == 0 && !bytes.Equal(sa, snapshot(t, a, uint64(i))) {
					t.Fatalf("input %d: two snapshots of the same state differ", i)
				}
				if got, want := apply(t, a, in[i]), apply(t, b, in[i]); got != want {
					t.Fatalf("input %d: the actor snapshotted gives other outputs", i)
				}
			}
			if !bytes.Equal(snapshot(t, a, 9), snapshot(t, b, 9)) {
				t.Fatal("two actors fed the same inputs give other snapshots")
			}
		})
	}
}

// TestSnapshotQueuedEvents: alarm events queued when the snapshot is taken
// (not yet collected by Events) are restored with it.
func TestSnapshotQueuedEvents(t *testing.T) {
	site := testSites()[1]
	cfg := quickAlarms().WithDefaults()
	in := inputs(variedFeed(site, 4, 19))
	a, err := NewActor(site, cfg)
	if err != nil {
		t.Fatal(err)
	}
	for i, x := range in {
		if x.run != nil {
			_ = a.Weather(x.run)
		} else {
			_ = a.Meter(x.reading)
		}
		if len(a.events) == 0 {
			a.Refresh()
			continue
		}
		b, _, err := RestoreActor(site, cfg, snapshot(t, a, uint64(i)))
		if err != nil {
			t.Fatal(err)
		}
		want, got := a.Events(), b.Events()
		if len(got) != len(want) {
			t.Fatalf("%d events restored, want %d", len(got), len(want))
		}
		for k := range want {
			if fmt.Sprintf("%#v", got[k]) != fmt.Sprintf("%#v", want[k]) {
				t.Fatalf("event %d restored as %+v, want %+v", k, got[k], want[k])
			}
		}
		for j := i + 1; j < min(i+200, len(in)); j++ {
			if apply(t, a, in[j]) != apply(t, b, in[j]) {
				t.Fatalf("input %d gives other outputs", j)
			}
		}
		return
	}
	t.Fatal("the feed raised no alarm")
}

// quickAlarms is a configuration whose alarms judge after a few dozen
// outcomes with short half-lives and a low spread limit, so that the short
// invented feeds of the tests raise and clear them.
func quickAlarms() Config {
	o := conformal.AlarmOptions{Recent: 8, Reference: 64, MinSamples: 32, Z: 2}
	r := o
	r.Kind = conformal.KindRawDrift
	return Config{CoverageWindow: 96, Alarm: o, RawAlarm: r}
}

// noSnapshot is a forecaster that cannot encode its state.
type noSnapshot struct{ model.Forecaster }

// TestSnapshotRefused: RestoreActor refuses, with the documented sentinel,
// a snapshot of another format version, of another site or configuration,
// and corrupt, truncated or padded bytes, and neither Snapshot nor
// RestoreActor works with a forecaster that cannot encode its state.
func TestSnapshotRefused(t *testing.T) {
	sites := testSites()
	site := sites[1]
	cfg := snapConfig(t, "stack", conformal.MethodACI)
	a, err := NewActor(site, cfg)
	if err != nil {
		t.Fatal(err)
	}
	for _, x := range inputs(variedFeed(site, 2, 23)) {
		apply(t, a, x)
	}
	data := snapshot(t, a, 77)
	if _, seq, err := RestoreActor(site, cfg, data); err != nil || seq != 77 {
		t.Fatalf("the snapshot itself: sequence %d, error %v", seq, err)
	}
	// reseal recomputes the checksum of bytes changed on purpose.
	reseal := func(b []byte) []byte {
		binary.LittleEndian.PutUint32(b[len(b)-4:], crc32.ChecksumIEEE(b[:len(b)-4]))
		return b
	}
	other := func(f func(c *Config)) Config {
		c := cfg
		f(&c)
		return c
	}
	otherSite := site
	otherSite.ID = "wind-other"
	pvSite := site
	pvSite.Kind = model.KindPV
	cases := []struct {
		name string
		site model.Site
		cfg  Config
		data []byte
		want error
	}{
		{"another version", site, cfg, func() []byte {
			b := slices.Clone(data)
			binary.LittleEndian.PutUint16(b[4:], snapshotVersion+1)
			return reseal(b)
		}(), ErrSnapshotVersion},
		{"another forecaster state version", site, cfg, func() []byte {
			// The forecaster's state is the last blob: its version follows
			// its 4-byte magic.
			b := slices.Clone(data)
			i := bytes.LastIndex(b, []byte("pmST"))
			b[i+4]++
			return reseal(b)
		}(), ErrSnapshotVersion},
		{"another site", otherSite, cfg, data, ErrSnapshotMismatch},
		{"another kind", pvSite, cfg, data, ErrSnapshotMismatch},
		{"other levels", site, other(func(c *Config) { c.Levels = model.LevelGrid(10) }), data, ErrSnapshotMismatch},
		{"other buckets", site, other(func(c *Config) { c.Buckets = model.Buckets{Edges: []int{0, 120, 720}} }), data, ErrSnapshotMismatch},
		{"another calibrator", site, snapConfig(t, "stack", conformal.MethodPID), data, ErrSnapshotMismatch},
		{"another forecaster", site, snapConfig(t, "baseline", conformal.MethodACI), data, ErrSnapshotMismatch},
		{"other forecaster options", site, other(func(c *Config) {
			c.NewForecaster = func(s model.Site) model.Forecaster {
				return model.NewStack(s, model.Setup{Buckets: c.Buckets, Levels: c.Levels}, model.StackOptions{MinRows: 100})
			}
		}), data, ErrSnapshotMismatch},
		{"bad magic", site, cfg, append([]byte("XLSN"), data[4:]...), ErrSnapshotCorrupt},
		{"empty", site, cfg, nil, ErrSnapshotCorrupt},
		{"a flipped bit", site, cfg, func() []byte { b := slices.Clone(data); b[len(b)/2] ^= 8; return b }(), ErrSnapshotCorrupt},
		{"padded", site, cfg, reseal(append(slices.Clone(data[:len(data)-4]), 0, 0, 0, 0, 0)), ErrSnapshotCorrupt},
		{"a mean forecasts issued below 1", site, cfg, func() []byte {
			// The lead buckets' means follow the cells, side by side.
			var means []byte
			for _, m := range a.issuedMean {
				means = binary.LittleEndian.AppendUint64(means, math.Float64bits(m))
			}
			b := slices.Clone(data)
			i := bytes.Index(b, means)
			if a.issuedMean[0] < 1 || i < 0 || bytes.LastIndex(b, means) != i {
				t.Fatalf("the means %v are not found once in the snapshot", a.issuedMean)
			}
			binary.LittleEndian.PutUint64(b[i:], math.Float64bits(0.5))
			return reseal(b)
		}(), ErrSnapshotCorrupt},
		{"a meter_flat alarm raised without a run", site, cfg, func() []byte {
			// The run of equal readings follows the means: value (8
			// bytes), start and end (12 each), covered (8), readings (8),
			// raised (1).
			var means []byte
			for _, m := range a.issuedMean {
				means = binary.LittleEndian.AppendUint64(means, math.Float64bits(m))
			}
			b := slices.Clone(data)
			i := bytes.Index(b, means) + len(means)
			binary.LittleEndian.PutUint64(b[i+40:], 0)
			b[i+48] = 1
			return reseal(b)
		}(), ErrSnapshotCorrupt},
		{"a huge count", site, cfg, func() []byte {
			// The count of runs follows the header and the clock.
			b := slices.Clone(data)
			off := len(data) - len(a.runsAndAfter(t, data))
			binary.LittleEndian.PutUint32(b[off:], 1<<31)
			return reseal(b)
		}(), ErrSnapshotCorrupt},
	}
	for n := 0; n < len(data); n += max(1, len(data)/300) {
		cases = append(cases, struct {
			name string
			site model.Site
			cfg  Config
			data []byte
			want error
		}{fmt.Sprintf("truncated to %d bytes", n), site, cfg, data[:n], ErrSnapshotCorrupt})
		cases = append(cases, struct {
			name string
			site model.Site
			cfg  Config
			data []byte
			want error
		}{fmt.Sprintf("truncated to %d bytes, resealed", n), site, cfg, reseal(append(slices.Clone(data[:n]), 0, 0, 0, 0)), ErrSnapshotCorrupt})
	}
	for _, c := range cases {
		b, _, err := RestoreActor(c.site, c.cfg, c.data)
		if testing.Verbose() && !strings.HasPrefix(c.name, "truncated") {
			t.Logf("%s: %v", c.name, err)
		}
		if !errors.Is(err, c.want) || b != nil {
			t.Errorf("%s: actor %v, error %v, want one wrapping %v", c.name, b != nil, err, c.want)
		}
	}

	unsupported := other(func(c *Config) {
		c.NewForecaster = func(s model.Site) model.Forecaster {
			return noSnapshot{model.NewBaseline(s.Kind, model.BaselineOptions{})}
		}
	})
	u, err := NewActor(site, unsupported)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := u.Snapshot(1); !errors.Is(err, ErrSnapshotUnsupported) {
		t.Errorf("Snapshot with a forecaster that cannot encode its state: error %v, want one wrapping ErrSnapshotUnsupported", err)
	}
	if _, _, err := RestoreActor(site, unsupported, data); !errors.Is(err, ErrSnapshotUnsupported) {
		t.Errorf("RestoreActor with a forecaster that cannot restore a state: error %v, want one wrapping ErrSnapshotUnsupported", err)
	}
}

// runsAndAfter returns the part of a's snapshot data from the count of
// runs on: what follows the header and the clock.
func (a *Actor) runsAndAfter(t *testing.T, data []byte) []byte {
	t.Helper()
	w := &snapWriter{}
	a.writeHeader(w, 0)
	return data[6+len(w.b)+3*12+96*12+8+8+8:]
}

// fuzzConfigs are the configurations FuzzRestoreActor restores under:
// small ones (3 levels, 3 lead buckets, 6 h ahead, short windows), so that
// the snapshots are small and the fuzzer quick.
func fuzzConfigs() []Config {
	base := Config{
		Levels:         []float64{0.1, 0.5, 0.9},
		Buckets:        model.Buckets{Edges: []int{0, 60, 180}},
		HorizonMinutes: 360,
		CoverageWindow: 48,
	}
	var cs []Config
	for i, m := range []string{conformal.MethodACI, conformal.MethodSplit, conformal.MethodDtACI} {
		c := base
		c.Calibrator = conformal.Options{Method: m}
		c.NewForecaster = []func(model.Site) model.Forecaster{
			func(s model.Site) model.Forecaster {
				return model.NewBaseline(s.Kind, model.BaselineOptions{Buckets: base.Buckets, Window: 64})
			},
			func(model.Site) model.Forecaster {
				return model.NewPersistence(model.PersistenceOptions{Buckets: base.Buckets, Window: 64})
			},
			func(s model.Site) model.Forecaster {
				return model.NewStack(s, model.Setup{Buckets: base.Buckets, Levels: base.Levels}, model.StackOptions{})
			},
		}[i]
		cs = append(cs, c.WithDefaults())
	}
	return cs
}

// FuzzRestoreActor: whatever the bytes, RestoreActor returns an error
// wrapping one of its sentinels or an actor that refreshes, takes inputs
// and snapshots without panicking; it never panics. With reseal set the
// checksum is recomputed first, so that the fuzzer reaches past it. The
// seeds are real snapshots, each also truncated.
func FuzzRestoreActor(f *testing.F) {
	site := testSites()[1]
	in := inputs(variedFeed(site, 1, 29))
	for _, cfg := range fuzzConfigs() {
		a, err := NewActor(site, cfg)
		if err != nil {
			f.Fatal(err)
		}
		for i, x := range in {
			if x.run != nil {
				_ = a.Weather(x.run)
			} else {
				_ = a.Meter(x.reading)
			}
			a.Refresh()
			if i == 5 || i == 90 {
				data := snapshot(f, a, uint64(i))
				f.Add(data, false)
				f.Add(data, true)
				f.Add(data[:len(data)/3], true)
			}
		}
	}
	sentinels := []error{ErrSnapshotVersion, ErrSnapshotMismatch, ErrSnapshotCorrupt}
	more := in[len(in)-4:]
	f.Fuzz(func(t *testing.T, data []byte, reseal bool) {
		if reseal && len(data) >= 10 {
			data = slices.Clone(data)
			binary.LittleEndian.PutUint32(data[len(data)-4:], crc32.ChecksumIEEE(data[:len(data)-4]))
		}
		for _, cfg := range fuzzConfigs() {
			a, _, err := RestoreActor(site, cfg, data)
			if err != nil {
				if !slices.ContainsFunc(sentinels, func(e error) bool { return errors.Is(err, e) }) {
					t.Fatalf("error %v wraps none of the sentinels", err)
				}
				continue
			}
			a.Refresh()
			if _, err := a.Snapshot(1); err != nil {
				t.Fatalf("a restored actor does not snapshot: %v", err)
			}
			for _, x := range more {
				if x.run != nil {
					_ = a.Weather(x.run)
				} else {
					_ = a.Meter(x.reading)
				}
				a.Refresh()
			}
		}
	})
}

// BenchmarkSnapshot times Actor.Snapshot of an actor warmed with warmDays
// of invented data (144 steps, 19 levels), and reports the snapshot's
// size.
func BenchmarkSnapshot(b *testing.B) {
	for _, name := range []string{"baseline", "stack"} {
		for _, site := range testSites() {
			b.Run(name+"/"+site.ID, func(b *testing.B) {
				a, _ := warmActorWith(b, site, 144, 19, name)
				data := snapshot(b, a, 1)
				b.ReportAllocs()
				b.ResetTimer()
				for b.Loop() {
					if _, err := a.Snapshot(1); err != nil {
						b.Fatal(err)
					}
				}
				b.ReportMetric(float64(len(data)), "bytes")
			})
		}
	}
}

// BenchmarkRestoreActor times RestoreActor of the snapshots of
// BenchmarkSnapshot; for the Stack it includes growing the forest in use
// again.
func BenchmarkRestoreActor(b *testing.B) {
	for _, name := range []string{"baseline", "stack"} {
		for _, site := range testSites() {
			b.Run(name+"/"+site.ID, func(b *testing.B) {
				a, _ := warmActorWith(b, site, 144, 19, name)
				data := snapshot(b, a, 1)
				b.ReportAllocs()
				b.ResetTimer()
				for b.Loop() {
					if _, _, err := RestoreActor(site, a.cfg, data); err != nil {
						b.Fatal(err)
					}
				}
				b.ReportMetric(float64(len(data)), "bytes")
			})
		}
	}
}

// TestSnapshotHasNoSideEffect: taking snapshots (as durable mode does, at
// wall-clock times) changes nothing an actor gives afterwards, nor its
// final state.
func TestSnapshotHasNoSideEffect(t *testing.T) {
	for _, site := range testSites() {
		t.Run(site.ID, func(t *testing.T) {
			f := variedFeed(site, 6, 99)
			in := inputs(f)
			cfg := Config{}.WithDefaults()
			plain, err := NewActor(site, cfg)
			if err != nil {
				t.Fatal(err)
			}
			snapped, err := NewActor(site, cfg)
			if err != nil {
				t.Fatal(err)
			}
			for i, x := range in {
				if i%7 == 3 {
					if _, err := snapped.Snapshot(uint64(i)); err != nil {
						t.Fatal(err)
					}
				}
				if a, b := apply(t, plain, x), apply(t, snapped, x); a != b {
					t.Fatalf("input %d: the actor that was snapshot gives something else", i)
				}
			}
			a, err := plain.Snapshot(1)
			if err != nil {
				t.Fatal(err)
			}
			b, err := snapped.Snapshot(1)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(a, b) {
				t.Fatal("the final snapshots differ")
			}
		})
	}
}

// TestSnapshotOldVersionsMigrate: snapshots of format versions 2 and 1
// restore, and are written back as the current version (7; its coverage
// monitors, of their version 1 in the old snapshot, get new alarms). testdata/snapshot_v2_pv.bin
// was written by the code of commit 4fa8b0e (format version 2, which also
// held the latest forecast's features of each pending forecast) for the
// pv-test site fed variedFeed(pv-test, 2, 23), baseline forecaster, aci,
// sequence 77. Its version 1 form (the same bytes without the held
// section: written before the reorder window) must restore to the same
// state, with nothing held; the current snapshot of that state restores
// to itself, and all three give the same next bundle.
func TestSnapshotOldVersionsMigrate(t *testing.T) {
	site := testSites()[0]
	cfg := snapConfig(t, "baseline", conformal.MethodACI)
	v2, err := os.ReadFile("testdata/snapshot_v2_pv.bin")
	if err != nil {
		t.Fatal(err)
	}
	if v := binary.LittleEndian.Uint16(v2[4:]); v != 2 {
		t.Fatalf("testdata snapshot of version %d, want 2", v)
	}
	a, seq, err := RestoreActor(site, cfg, v2)
	if err != nil || seq != 77 {
		t.Fatalf("version 2 refused: %v (sequence %d)", err, seq)
	}
	v3 := snapshot(t, a, 77)
	if v := binary.LittleEndian.Uint16(v3[4:]); v != snapshotVersion || snapshotVersion != 7 {
		t.Fatalf("written back as version %d", v)
	}
	c, _, err := RestoreActor(site, cfg, v3)
	if err != nil {
		t.Fatal(err)
	}
	if again := snapshot(t, c, 77); !bytes.Equal(again, v3) {
		t.Error("the current snapshot of a migrated state does not restore to itself")
	}

	fstate, err := a.fc.(model.Snapshotter).MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	// Version 1: the version 2 bytes without the held section (a time and
	// a zero count, 16 bytes) before the forecaster's state.
	at := len(v2) - 4 - (4 + len(fstate)) - 16
	if n := binary.LittleEndian.Uint32(v2[at+12:]); n != 0 {
		t.Fatalf("held count %d where 0 was expected: the layout moved", n)
	}
	v1 := slices.Concat(v2[:at], v2[at+16:len(v2)-4])
	binary.LittleEndian.PutUint16(v1[4:], 1)
	v1 = binary.LittleEndian.AppendUint32(v1, crc32.ChecksumIEEE(v1))
	if seq, err := SnapshotSeq(v1); err != nil || seq != 77 {
		t.Fatalf("SnapshotSeq of version 1: %d, %v", seq, err)
	}
	b, seq, err := RestoreActor(site, cfg, v1)
	if err != nil || seq != 77 {
		t.Fatalf("version 1 refused: %v (sequence %d)", err, seq)
	}
	if b.Held() != 0 {
		t.Errorf("%d inputs held after a version 1 restore", b.Held())
	}
	if again := snapshot(t, b, 77); !bytes.Equal(again, v3) {
		t.Error("a version 1 snapshot restores to another state than the version 2 one")
	}

	enc := stream.NewBundleEncoder()
	var want bytes.Buffer
	if err := enc.Encode(&want, a.Refresh()); err != nil {
		t.Fatal(err)
	}
	for name, x := range map[string]*Actor{"version 1": b, "version 3": c} {
		var got bytes.Buffer
		if err := enc.Encode(&got, x.Refresh()); err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got.Bytes(), want.Bytes()) {
			t.Errorf("the %s restore's next bundle differs from the version 2 restore's", name)
		}
	}
}

// TestSnapshotVersion4Migrates restores a version 4 snapshot of a dtaci
// site written before the pending forecasts kept their bucket's
// settlements at issue (testdata/snapshot_v4_pv_dtaci.bin, three days of
// the bench feed, written by commit efd4ff0): it restores, its pending
// forecasts' lags are unknown (their outcomes judge dtaci's experts at
// their miss rates now, as that build did), its calibrators restore from
// their version 1 states, and it writes back as the current version,
// which restores to itself. Forecasts issued after the restore know their
// lag.
func TestSnapshotVersion4Migrates(t *testing.T) {
	site := testSites()[0]
	cfg := snapConfig(t, "baseline", conformal.MethodDtACI)
	v4, err := os.ReadFile("testdata/snapshot_v4_pv_dtaci.bin")
	if err != nil {
		t.Fatal(err)
	}
	if v := binary.LittleEndian.Uint16(v4[4:]); v != 4 {
		t.Fatalf("testdata snapshot of version %d, want 4", v)
	}
	a, seq, err := RestoreActor(site, cfg, v4)
	if err != nil || seq != 91 {
		t.Fatalf("version 4 refused: %v (sequence %d)", err, seq)
	}
	unknown := 0
	for r := range a.nrec {
		px, _, _ := a.record(r)
		if px.settledAt == -1 {
			unknown++
		}
	}
	if unknown == 0 {
		t.Fatal("no pending forecast restored with an unknown lag")
	}
	cur := snapshot(t, a, 91)
	if v := binary.LittleEndian.Uint16(cur[4:]); v != snapshotVersion {
		t.Fatalf("written back as version %d", v)
	}
	b, _, err := RestoreActor(site, cfg, cur)
	if err != nil {
		t.Fatal(err)
	}
	if again := snapshot(t, b, 91); !bytes.Equal(again, cur) {
		t.Error("the current snapshot of a migrated state does not restore to itself")
	}
	b.Refresh()
	known := 0
	for r := range b.nrec {
		if px, _, _ := b.record(r); px.settledAt >= 0 {
			known++
		}
	}
	if known == 0 {
		t.Error("no forecast issued after the restore knows its lag")
	}
}

// TestSnapshotVersion6Migrates restores a version 6 snapshot, written
// before the actor followed the run of equal meter readings
// (testdata/snapshot_v6_pv_aci.bin: the pv-test site fed
// variedFeed(pv-test, 3, 11), baseline forecaster, aci, sequence 298,
// written by the code of commit 7652e3d): it restores with no run, writes
// back as the current version, which restores to itself, and a meter
// stuck after it raises meter_flat once the limit has passed.
func TestSnapshotVersion6Migrates(t *testing.T) {
	site := testSites()[0]
	cfg := snapConfig(t, "baseline", conformal.MethodACI)
	v6, err := os.ReadFile("testdata/snapshot_v6_pv_aci.bin")
	if err != nil {
		t.Fatal(err)
	}
	if v := binary.LittleEndian.Uint16(v6[4:]); v != 6 {
		t.Fatalf("testdata snapshot of version %d, want 6", v)
	}
	a, seq, err := RestoreActor(site, cfg, v6)
	if err != nil || seq != 298 {
		t.Fatalf("version 6 refused: %v (sequence %d)", err, seq)
	}
	if a.flat != (flatMeter{}) {
		t.Fatalf("restored with a run of equal readings %+v, want none", a.flat)
	}
	cur := snapshot(t, a, seq)
	if v := binary.LittleEndian.Uint16(cur[4:]); v != snapshotVersion || snapshotVersion != 7 {
		t.Fatalf("written back as version %d", v)
	}
	b, _, err := RestoreActor(site, cfg, cur)
	if err != nil {
		t.Fatal(err)
	}
	if again := snapshot(t, b, seq); !bytes.Equal(again, cur) {
		t.Error("the current snapshot of a migrated state does not restore to itself")
	}
	b.Events()
	stuck := 0.4 * site.CapacityMW
	start := b.Now()
	var raised []conformal.Event
	for k := 0; k < 4*15; k++ { // 15 hours of 15-minute readings
		r := &model.Reading{Site: site.ID, IntervalStart: start.Add(time.Duration(k) * 15 * time.Minute), IntervalMinutes: 15, PowerMW: stuck, Availability: 1}
		if err := b.Meter(r); err != nil {
			t.Fatal(err)
		}
		for _, e := range b.Events() {
			if e.Kind == KindMeterFlat {
				raised = append(raised, e)
			}
		}
	}
	if len(raised) != 1 || raised[0].State != conformal.StateRaised || !raised[0].EventTime.Equal(start.Add(DefaultMeterFlat)) {
		t.Errorf("a meter stuck for 15 h after the restore raised %+v, want one raise at %s", raised, start.Add(DefaultMeterFlat))
	}
}

// TestSnapshotVersion5Migrates restores a version 5 snapshot, written
// before the lead buckets kept the mean forecasts issued per settled
// interval (testdata/snapshot_v5_pv_aci.bin: the pv-test site fed
// variedFeed(pv-test, 3, 11), baseline forecaster, aci, sequence 298,
// written by the code of commit 4393ca8): it restores with every mean
// unknown (0), writes back as the current version, which restores to
// itself, and the settlements after it start the means again.
func TestSnapshotVersion5Migrates(t *testing.T) {
	site := testSites()[0]
	cfg := snapConfig(t, "baseline", conformal.MethodACI)
	v5, err := os.ReadFile("testdata/snapshot_v5_pv_aci.bin")
	if err != nil {
		t.Fatal(err)
	}
	if v := binary.LittleEndian.Uint16(v5[4:]); v != 5 {
		t.Fatalf("testdata snapshot of version %d, want 5", v)
	}
	a, seq, err := RestoreActor(site, cfg, v5)
	if err != nil || seq != 298 {
		t.Fatalf("version 5 refused: %v (sequence %d)", err, seq)
	}
	for b, m := range a.issuedMean {
		if m != 0 {
			t.Fatalf("bucket %d restored with mean forecasts issued %v, want 0 (unknown)", b, m)
		}
	}
	cur := snapshot(t, a, seq)
	if v := binary.LittleEndian.Uint16(cur[4:]); v != snapshotVersion {
		t.Fatalf("written back as version %d", v)
	}
	b, _, err := RestoreActor(site, cfg, cur)
	if err != nil {
		t.Fatal(err)
	}
	if again := snapshot(t, b, seq); !bytes.Equal(again, cur) {
		t.Error("the current snapshot of a migrated state does not restore to itself")
	}
	fed := 0
	for _, in := range inputs(variedFeed(site, 5, 11)) {
		if in.reading == nil || !in.reading.IntervalStart.After(b.now) {
			continue
		}
		apply(t, b, in)
		fed++
	}
	known := 0
	for _, m := range b.issuedMean {
		if m >= 1 {
			known++
		}
	}
	if fed == 0 || known == 0 {
		t.Errorf("%d readings after the restore; %d lead buckets know their mean forecasts issued", fed, known)
	}
	again := snapshot(t, b, seq+uint64(fed))
	c, _, err := RestoreActor(site, cfg, again)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(c.issuedMean, b.issuedMean) {
		t.Errorf("means %v restored as %v", b.issuedMean, c.issuedMean)
	}
}
