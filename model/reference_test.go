package model

import (
	"math"
	"math/rand/v2"
	"sort"
	"testing"
	"time"
)

// type7 is the empirical quantile of xs at level p in (0, 1), written
// directly from its definition in Hyndman and Fan, "Sample quantiles in
// statistical packages", The American Statistician 50(4), 1996, type 7:
// with x(1) <= ... <= x(n), h = (n-1)p + 1, Q = x(floor h) + (h - floor h)
// (x(floor h + 1) - x(floor h)). It sorts a copy; the code under test keeps
// its window sorted incrementally.
func type7(xs []float64, p float64) float64 {
	x := append([]float64(nil), xs...)
	sort.Float64s(x)
	h := float64(len(x)-1)*p + 1 // 1-based
	lo := math.Floor(h)
	if int(lo) >= len(x) {
		return x[len(x)-1]
	}
	return x[int(lo)-1] + (h-lo)*(x[int(lo)]-x[int(lo)-1])
}

// day0 is the first day of the hand-made series.
var day0 = time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)

// at returns the start of the interval at hour:minute on day d of the series.
func at(d, hour, minute int) time.Time {
	return day0.Add(time.Duration(d)*24*time.Hour + time.Duration(hour)*time.Hour + time.Duration(minute)*time.Minute)
}

// interval returns the features of a pending forecast for the interval
// starting at t.
func interval(t time.Time, minutes, bucket int, last float64) *Features {
	return &Features{
		ValidStart: t, ValidMinutes: minutes, Bucket: bucket,
		CapacityMW: 10, Availability: 1, Driver: math.NaN(), RunAgeMinutes: math.NaN(), LastPowerMW: last,
	}
}

func quantiles(f Forecaster, x *Features, levels ...float64) []float64 {
	dst := make([]float64, len(levels))
	f.Quantiles(dst, x, levels)
	return dst
}

func near(a, b float64) bool { return math.Abs(a-b) <= 1e-12*(1+math.Abs(b)) }

func sameQuantiles(t *testing.T, what string, got, want []float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: %d values, want %d", what, len(got), len(want))
	}
	for j := range want {
		if !near(got[j], want[j]) && !(math.IsInf(want[j], 0) && got[j] == want[j]) {
			t.Errorf("%s: value %d is %v, want %v (all: %v, want %v)", what, j, got[j], want[j], got, want)
			return
		}
	}
}

// TestType7HandValues holds the test's own type-7 helper to values worked
// by hand from the definition (Hyndman and Fan 1996, type 7).
func TestType7HandValues(t *testing.T) {
	x := []float64{4, 1, 3, 2, 5} // sorted 1 2 3 4 5
	for _, c := range []struct {
		name string
		p    float64
		want float64
	}{
		{"h=2.2 between 2 and 3", 0.3, 2.2},
		{"median", 0.5, 3},
		{"h=4.6 between 4 and 5", 0.9, 4.6},
		{"h=1.04 just above the minimum", 0.01, 1.04},
	} {
		t.Run(c.name, func(t *testing.T) {
			if got := type7(x, c.p); !near(got, c.want) {
				t.Fatalf("type7(%v, %v) = %v, want %v", x, c.p, got, c.want)
			}
		})
	}
}

// TestResidualPoolDropOldest checks the pool's window when its oldest values
// are dropped as well as pushed out, against the same window kept naively.
func TestResidualPoolDropOldest(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	p := newResidualPool(20)
	var win []float64 // arrival order
	for i := 0; i < 2000; i++ {
		if len(win) > 0 && rng.IntN(3) == 0 {
			if got := p.ring[p.oldest()]; got != win[0] {
				t.Fatalf("step %d: oldest %v, want %v", i, got, win[0])
			}
			p.dropOldest()
			win = win[1:]
		} else {
			v := math.Round(rng.NormFloat64()*4) / 2 // ties on purpose
			p.add(v)
			win = append(win, v)
			if len(win) > 20 {
				win = win[1:]
			}
		}
		want := append([]float64(nil), win...)
		sort.Float64s(want)
		if len(want) != p.len() {
			t.Fatalf("step %d: %d values, want %d", i, p.len(), len(want))
		}
		for k := range want {
			if want[k] != p.sorted[k] {
				t.Fatalf("step %d: sorted window differs at %d: %v, want %v", i, k, p.sorted, want)
			}
		}
		if len(want) > 0 {
			for _, l := range []float64{0.1, 0.5, 0.9} {
				if got, w := p.quantile(l), type7(want, l); !near(got, w) {
					t.Fatalf("step %d: quantile(%v) = %v, want %v (type 7)", i, l, got, w)
				}
			}
		}
	}
}

// TestClimatologyExactQuantiles feeds an hourly series whose 10:00 values
// are 4, 1, 3, 2, 5 on five days, 11:00 values 100 more, and checks the
// type-7 quantiles worked by hand (Hyndman and Fan 1996, type 7).
func TestClimatologyExactQuantiles(t *testing.T) {
	c := NewClimatology(ClimatologyOptions{})
	for d, v := range []float64{4, 1, 3, 2, 5} {
		c.Learn(v, []*Features{interval(at(d, 10, 0), 60, 0, math.NaN())})
		c.Learn(v+100, []*Features{interval(at(d, 11, 0), 60, 0, math.NaN())})
	}
	levels := []float64{-0.2, 0, 0.3, 0.5, 0.9, 1, 1.2}
	inf, ninf := math.Inf(1), math.Inf(-1)
	// A forecast for a later day, any lead: only the slot matters.
	x := interval(at(9, 10, 0), 60, 6, 7)
	sameQuantiles(t, "10:00", quantiles(c, x, levels...), []float64{ninf, ninf, 2.2, 3, 4.6, inf, inf})
	x = interval(at(9, 11, 0), 60, 0, math.NaN())
	sameQuantiles(t, "11:00", quantiles(c, x, levels...), []float64{ninf, ninf, 102.2, 103, 104.6, inf, inf})
}

func TestClimatologyFallbacks(t *testing.T) {
	levels := []float64{0.25, 0.5, 0.75}
	t.Run("nothing learned: uniform over capacity x availability", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{})
		x := interval(at(0, 10, 0), 60, 0, math.NaN())
		x.Availability = 0.5 // 5 MW available
		sameQuantiles(t, "empty", quantiles(c, x, levels...), []float64{1.25, 2.5, 3.75})
	})
	t.Run("empty slot: every slot pooled", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{})
		pooled := []float64{7, 1, 4, 2, 6}
		for i, v := range pooled {
			c.Learn(v, []*Features{interval(at(0, i, 0), 60, 0, math.NaN())})
		}
		x := interval(at(1, 20, 0), 60, 0, math.NaN())
		want := []float64{type7(pooled, 0.25), type7(pooled, 0.5), type7(pooled, 0.75)}
		sameQuantiles(t, "pooled", quantiles(c, x, levels...), want)
		// Worked by hand: sorted 1 2 4 6 7, h = 2, 3, 4.
		sameQuantiles(t, "pooled by hand", want, []float64{2, 4, 6})
	})
	t.Run("15-minute data: 10:15 is its own slot", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{})
		for d := 0; d < 3; d++ {
			c.Learn(1, []*Features{interval(at(d, 10, 0), 15, 0, math.NaN())})
			c.Learn(9, []*Features{interval(at(d, 10, 15), 15, 0, math.NaN())})
		}
		sameQuantiles(t, "10:00", quantiles(c, interval(at(5, 10, 0), 15, 0, 0), levels...), []float64{1, 1, 1})
		sameQuantiles(t, "10:15", quantiles(c, interval(at(5, 10, 15), 15, 0, 0), levels...), []float64{9, 9, 9})
	})
}

// TestClimatologyWindow checks that a slot keeps the values of the last
// Days days only: by count when every day has a reading, by age across a gap.
func TestClimatologyWindow(t *testing.T) {
	levels := []float64{0.5, 0.999}
	t.Run("a ring of Days values", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{Days: 3})
		for d, v := range []float64{50, 40, 3, 1, 2} {
			c.Learn(v, []*Features{interval(at(d, 10, 0), 60, 0, math.NaN())})
		}
		// Days 2 to 4 remain: 3, 1, 2.
		want := []float64{type7([]float64{3, 1, 2}, 0.5), type7([]float64{3, 1, 2}, 0.999)}
		sameQuantiles(t, "last 3 days", quantiles(c, interval(at(5, 10, 0), 60, 0, 0), levels...), want)
		sameQuantiles(t, "by hand", want, []float64{2, 2.998})
	})
	t.Run("values older than Days days dropped across a gap", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{Days: 3})
		for d, v := range []float64{50, 40, 30} {
			c.Learn(v, []*Features{interval(at(d, 10, 0), 60, 0, math.NaN())})
		}
		// No 10:00 reading on days 3 and 4; 11:00 readings go on.
		for d := 0; d <= 4; d++ {
			c.Learn(float64(d), []*Features{interval(at(d, 11, 0), 60, 0, math.NaN())})
		}
		// Latest learned: day 4 11:00; the window keeps intervals starting
		// after day 1 11:00. The 10:00 slot keeps day 2 (30) only.
		sameQuantiles(t, "10:00 after the gap", quantiles(c, interval(at(5, 10, 0), 60, 0, 0), levels...), []float64{30, 30})
		c.Learn(4, []*Features{interval(at(5, 11, 0), 60, 0, math.NaN())})
		// Now the window starts after day 2 11:00: the 10:00 slot is empty,
		// and the pooled fallback holds the 11:00 values of days 3 to 5.
		want := []float64{type7([]float64{3, 4, 4}, 0.5), type7([]float64{3, 4, 4}, 0.999)}
		sameQuantiles(t, "10:00 empty, pooled", quantiles(c, interval(at(6, 10, 0), 60, 0, 0), levels...), want)
	})
	t.Run("an interval exactly Days days old is dropped", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{Days: 2})
		c.Learn(8, []*Features{interval(at(0, 10, 0), 60, 0, math.NaN())})
		c.Learn(6, []*Features{interval(at(2, 10, 0), 60, 0, math.NaN())})
		sameQuantiles(t, "day 0 dropped", quantiles(c, interval(at(3, 10, 0), 60, 0, 0), levels...), []float64{6, 6})
	})
	t.Run("a reading settled after its window is ignored", func(t *testing.T) {
		c := NewClimatology(ClimatologyOptions{Days: 2})
		c.Learn(5, []*Features{interval(at(4, 10, 0), 60, 0, math.NaN())})
		c.Learn(99, []*Features{interval(at(1, 10, 0), 60, 0, math.NaN())}) // 3 days late
		sameQuantiles(t, "late", quantiles(c, interval(at(5, 10, 0), 60, 0, 0), levels...), []float64{5, 5})
	})
}

// TestClimatologyLearnsOncePerInterval feeds one interval with one pending
// forecast and another with three: each outcome counts once.
func TestClimatologyLearnsOncePerInterval(t *testing.T) {
	c := NewClimatology(ClimatologyOptions{})
	c.Learn(1, []*Features{interval(at(0, 10, 0), 60, 0, math.NaN())})
	t1 := at(1, 10, 0)
	c.Learn(5, []*Features{interval(t1, 60, 0, 2), interval(t1, 60, 3, 2), interval(t1, 60, 7, 2)})
	// Once each: {1, 5}, median 3. Thrice for the second: {1, 5, 5, 5}, median 5.
	sameQuantiles(t, "median", quantiles(c, interval(at(2, 10, 0), 60, 0, 0), 0.5), []float64{3})
	// Non-finite outcomes are not learned.
	c.Learn(math.NaN(), []*Features{interval(at(2, 10, 0), 60, 0, 0)})
	c.Learn(math.Inf(1), []*Features{interval(at(3, 10, 0), 60, 0, 0)})
	sameQuantiles(t, "median after NaN and Inf", quantiles(c, interval(at(4, 10, 0), 60, 0, 0), 0.5), []float64{3})
}

// learnErrors feeds Persistence one interval per error, each with one
// pending forecast in bucket b whose latest reading was last: y = last + e.
func learnErrors(p *Persistence, b int, last float64, errs []float64) {
	for i, e := range errs {
		p.Learn(last+e, []*Features{interval(at(i, 0, 0), 60, b, last)})
	}
}

// TestPersistenceKnownErrors checks the quantiles against a known error set:
// sorted -2, -1, 0.5, 1, 3, worked by hand (Hyndman and Fan 1996, type 7).
func TestPersistenceKnownErrors(t *testing.T) {
	p := NewPersistence(PersistenceOptions{MinErrors: 5})
	learnErrors(p, 2, 6, []float64{-2, 0.5, 1, 3, -1})
	levels := []float64{0, 0.25, 0.5, 0.9, 1}
	x := interval(at(9, 0, 0), 60, 2, 4)
	// h = 1, 2, 3.6: -1, 0.5, 1 + 0.6 x 2 = 2.2; plus the latest reading 4.
	sameQuantiles(t, "bucket 2", quantiles(p, x, levels...), []float64{math.Inf(-1), 3, 4.5, 6.2, math.Inf(1)})
}

func TestPersistenceBucketsAndFallbacks(t *testing.T) {
	levels := []float64{0.2, 0.5, 0.8}
	t.Run("nothing learned: uniform over capacity x availability", func(t *testing.T) {
		p := NewPersistence(PersistenceOptions{})
		x := interval(at(0, 0, 0), 60, 0, 3)
		x.Availability = 0.8 // 8 MW available
		sameQuantiles(t, "empty", quantiles(p, x, levels...), []float64{1.6, 4, 6.4})
	})
	t.Run("each pending forecast feeds its own bucket", func(t *testing.T) {
		p := NewPersistence(PersistenceOptions{MinErrors: 3})
		for i, y := range []float64{5, 6, 7} {
			t0 := at(i, 12, 0)
			// Latest reading 4 for the short lead, 1 for the long one.
			p.Learn(y, []*Features{interval(t0, 60, 0, 4), interval(t0, 60, 5, 1), interval(t0, 60, 6, math.NaN())})
		}
		// Bucket 0 errors 1, 2, 3; bucket 5 errors 4, 5, 6; bucket 6 none.
		sameQuantiles(t, "bucket 0", quantiles(p, interval(at(9, 0, 0), 60, 0, 0), levels...), []float64{1.4, 2, 2.6})
		sameQuantiles(t, "bucket 5", quantiles(p, interval(at(9, 0, 0), 60, 5, 0), levels...), []float64{4.4, 5, 5.6})
		// Bucket 6 has no error: every bucket pooled, 1..6.
		pooled := []float64{1, 2, 3, 4, 5, 6}
		want := []float64{type7(pooled, 0.2), type7(pooled, 0.5), type7(pooled, 0.8)}
		sameQuantiles(t, "bucket 6 pooled", quantiles(p, interval(at(9, 0, 0), 60, 6, 0), levels...), want)
		sameQuantiles(t, "pooled by hand", want, []float64{2, 3.5, 5})
		// A bucket beyond the last is the last.
		sameQuantiles(t, "bucket 99", quantiles(p, interval(at(9, 0, 0), 60, 99, 0), levels...), want)
	})
	t.Run("a bucket below MinErrors uses every bucket pooled", func(t *testing.T) {
		p := NewPersistence(PersistenceOptions{MinErrors: 3})
		learnErrors(p, 0, 2, []float64{1, 2, 3})
		learnErrors(p, 4, 2, []float64{10})
		pooled := []float64{1, 2, 3, 10}
		want := []float64{type7(pooled, 0.2), type7(pooled, 0.5), type7(pooled, 0.8)}
		sameQuantiles(t, "bucket 4", quantiles(p, interval(at(9, 0, 0), 60, 4, 0), levels...), want)
		// Worked by hand: h = 0.6, 1.5, 2.4 over 1 2 3 10.
		sameQuantiles(t, "by hand", want, []float64{1.6, 2.5, 5.8})
	})
	t.Run("few errors everywhere: uniform", func(t *testing.T) {
		p := NewPersistence(PersistenceOptions{MinErrors: 4})
		learnErrors(p, 1, 2, []float64{1, 1, 1})
		sameQuantiles(t, "below MinErrors", quantiles(p, interval(at(9, 0, 0), 60, 1, 2), levels...), []float64{2, 5, 8})
	})
	t.Run("no latest reading: the mean outcome", func(t *testing.T) {
		p := NewPersistence(PersistenceOptions{MinErrors: 3})
		learnErrors(p, 0, 2, []float64{-1, 0, 1, 4}) // outcomes 1, 2, 3, 6: mean 3
		sameQuantiles(t, "NaN latest", quantiles(p, interval(at(9, 0, 0), 60, 0, math.NaN()), 0.5), []float64{3 + 0.5})
	})
	t.Run("no latest reading, nothing learned: half the capacity", func(t *testing.T) {
		// Quantiles cannot show this point (errors come with outcomes, so
		// before any outcome the spread is uniform): check it on its own.
		p := NewPersistence(PersistenceOptions{})
		x := interval(at(9, 0, 0), 60, 0, math.NaN())
		x.Availability = 0.6
		if got := p.point(x); got != 3 {
			t.Fatalf("point %v, want 3 (half of 10 MW x 0.6)", got)
		}
	})
}

// TestPersistenceWindow checks the window against a naive one on a random
// stream of errors.
func TestPersistenceWindow(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	p := NewPersistence(PersistenceOptions{Window: 25, MinErrors: 10})
	var errs []float64
	for i := 0; i < 300; i++ {
		e := rng.NormFloat64()
		last := 5 + rng.Float64()
		p.Learn(last+e, []*Features{interval(at(0, 0, i), 1, 3, last)})
		errs = append(errs, (last+e)-last) // as the forecaster computes it
		if len(errs) > 25 {
			errs = errs[1:]
		}
		if len(errs) < 10 {
			continue
		}
		for _, l := range []float64{0.05, 0.5, 0.95} {
			got := quantiles(p, interval(at(1, 0, 0), 60, 3, 2), l)[0]
			if want := 2 + type7(errs, l); !near(got, want) {
				t.Fatalf("after %d errors: level %v: %v, want %v", i+1, l, got, want)
			}
		}
	}
}
