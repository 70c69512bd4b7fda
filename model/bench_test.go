package model

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// TestSortedRingMatchesResidualPool: the compact window of Baseline gives
// the same quantiles, bit for bit, as residualPool over the same values
// rounded to float32 (what the ring holds), as values come and go, duplicates included, at window sizes from 1 up.
func TestSortedRingMatchesResidualPool(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	levels := []float64{1e-9, 0.01, 0.05, 0.1, 0.25, 0.333, 0.5, 0.75, 0.9, 0.95, 0.99, 1 - 1e-9}
	for _, n := range []int{1, 2, 7, 50, 720} {
		t.Run(fmt.Sprintf("window=%d", n), func(t *testing.T) {
			ref := newResidualPool(n)
			r16 := newSortedRing[uint16](n)
			r32 := newSortedRing[uint32](n)
			for i := 0; i < 5*n+50; i++ {
				// Coarse values repeat often; no value is -0.
				v := float64(rng.IntN(33)-16) * 0.25
				if i%3 == 0 {
					v = rng.NormFloat64()
				}
				ref.add(float64(float32(v))) // the rings hold float32
				r16.add(v)
				r32.add(v)
				if r16.len() != ref.len() || r32.len() != ref.len() {
					t.Fatalf("step %d: %d and %d values, want %d", i, r16.len(), r32.len(), ref.len())
				}
				for _, l := range levels {
					want := math.Float64bits(ref.quantile(l))
					if got := math.Float64bits(r16.quantile(l)); got != want {
						t.Fatalf("step %d level %v: uint16 ring %v, want %v", i, l, r16.quantile(l), ref.quantile(l))
					}
					if got := math.Float64bits(r32.quantile(l)); got != want {
						t.Fatalf("step %d level %v: uint32 ring %v, want %v", i, l, r32.quantile(l), ref.quantile(l))
					}
				}
			}
		})
	}
}

// invented features for a wind or PV site: the driver changes every fourth
// step (hourly weather, 15-minute steps), some steps have none.
func benchFeatures(kind Kind, i int) Features {
	t0 := time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC)
	x := Features{
		ValidStart:    t0.Add(time.Duration(i) * 15 * time.Minute),
		ValidMinutes:  15,
		LeadMinutes:   15 * (i % 192),
		CapacityMW:    20,
		Availability:  1,
		Driver:        math.NaN(),
		RunAgeMinutes: 60,
		LastPowerMW:   7,
	}
	x.Bucket = DefaultBuckets().Of(x.LeadMinutes)
	if i%50 != 49 {
		h := float64(i/4) / 7
		if kind == KindPV {
			x.Driver = math.Max(0, 900*math.Sin(h))
		} else {
			x.Driver = 8 + 6*math.Sin(h)
		}
	}
	if i%97 == 0 {
		x.Availability = 0.8
	}
	return x
}

// warmBaseline returns a baseline that has learned days of invented
// outcomes, every lead bucket's pools filled.
func warmBaseline(kind Kind, days int) *Baseline {
	b := NewBaseline(kind, BaselineOptions{})
	rng := rand.New(rand.NewPCG(5, 6))
	xs := make([]Features, DefaultBuckets().Len())
	ptrs := make([]*Features, len(xs))
	for i := range days * 96 {
		for k := range xs {
			xs[k] = benchFeatures(kind, i)
			xs[k].Bucket = k
			ptrs[k] = &xs[k]
		}
		y := math.Max(0, math.Min(20, 10+5*rng.NormFloat64()))
		b.Learn(y, ptrs)
	}
	return b
}

// TestBaselineMemoMatchesFresh: answers from Baseline's memos are the
// answers it computes afresh, bit for bit, over a stream of calls like a
// refresh's (two grids of levels per step, the calibrated one changing
// between refreshes) with Learn calls between refreshes.
func TestBaselineMemoMatchesFresh(t *testing.T) {
	for _, kind := range []Kind{KindWind, KindPV} {
		memo, fresh := warmBaseline(kind, 3), warmBaseline(kind, 3)
		nominal := DefaultLevels()
		adjusted := make([]float64, len(nominal))
		got, want := make([]float64, len(nominal)), make([]float64, len(nominal))
		rng := rand.New(rand.NewPCG(8, 9))
		check := func(what string, x *Features, levels []float64) {
			t.Helper()
			memo.Quantiles(got, x, levels)
			fresh.est.ok = false
			fresh.memo[0].ok, fresh.memo[1].ok = false, false
			fresh.Quantiles(want, x, levels)
			for j := range got {
				if math.Float64bits(got[j]) != math.Float64bits(want[j]) {
					t.Fatalf("%s %s level %v: memo %v, fresh %v", kind, what, levels[j], got[j], want[j])
				}
			}
		}
		var last Features
		for refresh := range 40 {
			if refresh > 0 {
				// The calls that ended the last refresh, after Learn: a
				// memo kept across Learn would answer them.
				check(fmt.Sprintf("refresh %d, after learning", refresh), &last, nominal)
				check(fmt.Sprintf("refresh %d, after learning", refresh), &last, adjusted)
			}
			for j, l := range nominal {
				adjusted[j] = l + 0.02*rng.NormFloat64() // may leave (0, 1)
			}
			for i := range 192 {
				last = benchFeatures(kind, refresh*4+i)
				check(fmt.Sprintf("refresh %d step %d", refresh, i), &last, nominal)
				check(fmt.Sprintf("refresh %d step %d", refresh, i), &last, adjusted)
			}
			y := 10 + 5*rng.NormFloat64()
			memo.Learn(y, []*Features{&last})
			fresh.Learn(y, []*Features{&last})
		}
	}
}

// TestBaselineHotPathsDoNotAllocate holds Quantiles and Learn of a warm
// baseline to zero allocations.
func TestBaselineHotPathsDoNotAllocate(t *testing.T) {
	b := warmBaseline(KindWind, 10)
	levels := DefaultLevels()
	dst := make([]float64, len(levels))
	i := 0
	if n := testing.AllocsPerRun(1000, func() {
		x := benchFeatures(KindWind, i)
		b.Quantiles(dst, &x, levels)
		i++
	}); n != 0 {
		t.Errorf("Quantiles: %v allocations per call, want 0", n)
	}
	x := benchFeatures(KindWind, 0)
	xs := []*Features{&x}
	if n := testing.AllocsPerRun(1000, func() { b.Learn(7, xs) }); n != 0 {
		t.Errorf("Learn: %v allocations per call, want 0", n)
	}
}

// BenchmarkBaselineQuantiles times Quantiles of a warm baseline: "new"
// with a new driver at every call (every call computed), "refresh" with a
// refresh's pattern of calls (the nominal and a calibrated grid per step,
// the driver changing every fourth step).
func BenchmarkBaselineQuantiles(b *testing.B) {
	for _, nl := range []int{9, 19, 99} {
		levels := LevelGrid(nl + 1)
		adjusted := make([]float64, nl)
		for j, l := range levels {
			adjusted[j] = l * 1.01
		}
		bl := warmBaseline(KindWind, 10)
		dst := make([]float64, nl)
		b.Run(fmt.Sprintf("levels=%d/new", nl), func(b *testing.B) {
			x := benchFeatures(KindWind, 0)
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				x.Driver = 3 + float64(i%1000)*0.01
				bl.Quantiles(dst, &x, levels)
				i++
			}
		})
		b.Run(fmt.Sprintf("levels=%d/refresh", nl), func(b *testing.B) {
			xs := make([]Features, 192)
			for i := range xs {
				xs[i] = benchFeatures(KindWind, i)
			}
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				x := &xs[(i/2)%len(xs)]
				if i%2 == 0 {
					bl.Quantiles(dst, x, levels)
				} else {
					bl.Quantiles(dst, x, adjusted)
				}
				i++
			}
		})
	}
}

// BenchmarkBaselineLearn times Learn of one settled interval with a
// forecast pending in every lead bucket (the steady state of a site).
func BenchmarkBaselineLearn(b *testing.B) {
	bl := warmBaseline(KindWind, 10)
	xs := make([]Features, DefaultBuckets().Len())
	ptrs := make([]*Features, len(xs))
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		for k := range xs {
			xs[k] = benchFeatures(KindWind, i)
			xs[k].Bucket = k
			ptrs[k] = &xs[k]
		}
		bl.Learn(float64(i%20), ptrs)
		i++
	}
}
