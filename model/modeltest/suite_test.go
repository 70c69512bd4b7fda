package modeltest

import (
	"math"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// The suite must be able to fail: each broken forecaster below breaks one
// rule, and the replay must flag that rule (and, for the sound one, none).

// uniform is a sound forecaster that learns nothing: uniform over [0,
// capacity]. It serves as the base of the broken ones.
type uniform struct{}

func (uniform) Name() string                     { return "test-uniform" }
func (uniform) Learn(float64, []*model.Features) {}
func (uniform) Quantiles(dst []float64, x *model.Features, levels []float64) {
	for j, l := range levels {
		switch {
		case l <= 0:
			dst[j] = math.Inf(-1)
		case l >= 1:
			dst[j] = math.Inf(1)
		default:
			dst[j] = l * x.CapacityMW
		}
	}
}

// crossing gives quantiles decreasing in the level.
type crossing struct{ uniform }

func (crossing) Quantiles(dst []float64, x *model.Features, levels []float64) {
	uniform{}.Quantiles(dst, x, levels)
	for j, l := range levels {
		if l > 0 && l < 1 {
			dst[j] = (1 - l) * x.CapacityMW
		}
	}
}

// noInfinities gives finite values at levels 0 and 1 and beyond.
type noInfinities struct{ uniform }

func (noInfinities) Quantiles(dst []float64, x *model.Features, levels []float64) {
	for j, l := range levels {
		dst[j] = l * x.CapacityMW
	}
}

// skips leaves one cell of dst unwritten.
type skips struct{ uniform }

func (skips) Quantiles(dst []float64, x *model.Features, levels []float64) {
	uniform{}.Quantiles(dst[:len(dst)-3], x, levels[:len(levels)-3])
	dst[len(dst)-2], dst[len(dst)-1] = math.Inf(1), math.Inf(1)
}

// byIndex answers by the position of a level, not its value.
type byIndex struct{ uniform }

func (byIndex) Quantiles(dst []float64, x *model.Features, levels []float64) {
	uniform{}.Quantiles(dst, x, levels)
	for j, l := range levels {
		if l > 0 && l < 1 {
			dst[j] = float64(j)
		}
	}
}

// allocating allocates a scratch slice on every call.
type allocating struct {
	uniform
	keep []float64
}

func (a *allocating) Quantiles(dst []float64, x *model.Features, levels []float64) {
	a.keep = make([]float64, len(levels))
	uniform{}.Quantiles(a.keep, x, levels)
	copy(dst, a.keep)
}

// shared is nondeterministic: its instances share a call counter.
type shared struct {
	uniform
	calls *int
}

func (s shared) Quantiles(dst []float64, x *model.Features, levels []float64) {
	*s.calls++
	uniform{}.Quantiles(dst, x, levels)
	for j, l := range levels {
		if l > 0 && l < 1 {
			dst[j] += 1e-9 * float64(*s.calls%2)
		}
	}
}

// keeper keeps the features Learn was given and reads them later.
type keeper struct {
	uniform
	last *model.Features
}

func (k *keeper) Learn(_ float64, xs []*model.Features) { k.last = xs[0] }
func (k *keeper) Quantiles(dst []float64, x *model.Features, levels []float64) {
	uniform{}.Quantiles(dst, x, levels)
	if k.last == nil {
		return
	}
	for j, l := range levels {
		if l > 0 && l < 1 {
			dst[j] += 0 * k.last.CapacityMW // NaN once the actor reuses the record
		}
	}
}

// biased is the uniform forecaster shifted up by the whole capacity.
type biased struct{ uniform }

func (biased) Quantiles(dst []float64, x *model.Features, levels []float64) {
	uniform{}.Quantiles(dst, x, levels)
	for j := range dst {
		dst[j] += x.CapacityMW
	}
}

// miscovered tells whether a replay's coverage check fails at some level.
func (r *result) miscovered() bool {
	var total int
	for _, n := range r.settled {
		total += n
	}
	for c, l := range coverageLevels() {
		var hits int
		for b := range r.settled {
			hits += r.hits[b][c]
		}
		if math.Abs(float64(hits)/float64(total)-l) > tolerance {
			return true
		}
	}
	return false
}

func TestSuiteCatches(t *testing.T) {
	wind := sites()[1]
	h := generate(wind, 1)
	for _, c := range []struct {
		name  string
		newF  func() model.Forecaster
		flags func(r *result) bool
	}{
		{"crossing quantiles", func() model.Forecaster { return crossing{} }, func(r *result) bool { return r.structure.n > 0 }},
		{"finite at levels 0 and 1", func() model.Forecaster { return noInfinities{} }, func(r *result) bool { return r.structure.n > 0 }},
		{"a cell of dst unwritten", func() model.Forecaster { return skips{} }, func(r *result) bool { return r.structure.n > 0 }},
		{"answers by position", func() model.Forecaster { return byIndex{} }, func(r *result) bool { return r.order.n > 0 }},
		{"allocates", func() model.Forecaster { return &allocating{} }, func(r *result) bool { return r.allocs > 0 }},
		{"nondeterministic", func() func() model.Forecaster {
			calls := new(int)
			return func() model.Forecaster { return shared{calls: calls} }
		}(), func(r *result) bool { return r.determinism.n > 0 }},
		{"keeps the features of Learn", func() model.Forecaster { return &keeper{} }, func(r *result) bool { return r.structure.n > 0 }},
		{"biased", func() model.Forecaster { return biased{} }, func(r *result) bool { return r.miscovered() }},
	} {
		t.Run(c.name, func(t *testing.T) {
			r := replay(h, c.newF(), c.newF())
			if !c.flags(r) {
				t.Fatalf("the suite did not catch it: %+v", r)
			}
		})
	}
}

// TestSuiteSound checks that a sound forecaster raises no structural,
// order, allocation or determinism failure (its coverage is not judged: it
// learns nothing).
func TestSuiteSound(t *testing.T) {
	for i, s := range sites() {
		r := replay(generate(s, uint64(i+1)), uniform{}, uniform{})
		if r.structure.n+r.order.n+r.determinism.n > 0 || r.allocs > 0 || !r.allocsChecked {
			t.Fatalf("%s: %+v", s.ID, r)
		}
	}
}

// TestGenerate checks the synthetic history against what the suite's doc
// promises: 15-minute intervals, leads within their buckets up to 40 h,
// the latest reading at issue, features in order for Learn, nights for PV.
func TestGenerate(t *testing.T) {
	for i, s := range sites() {
		t.Run(s.ID, func(t *testing.T) {
			h := generate(s, uint64(i+1))
			nb := h.buckets.Len()
			var nights, issued int
			for k := range h.feats {
				x := &h.feats[k]
				iv, b := k/nb, k%nb
				if h.issue[k] < 0 {
					continue
				}
				issued++
				want := startTime().Add(time.Duration(iv*stepMinutes) * time.Minute)
				if !x.ValidStart.Equal(want) || x.ValidMinutes != stepMinutes || x.Bucket != b {
					t.Fatalf("feature %d: %v %d bucket %d, want %v 15 bucket %d", k, x.ValidStart, x.ValidMinutes, x.Bucket, want, b)
				}
				if x.LeadMinutes < 0 || x.LeadMinutes > maxLead || x.LeadMinutes%stepMinutes != 0 || h.buckets.Of(x.LeadMinutes) != b {
					t.Fatalf("feature %d: lead %d not in bucket %d", k, x.LeadMinutes, b)
				}
				if s := h.issue[k]; s != iv-x.LeadMinutes/stepMinutes {
					t.Fatalf("feature %d: issued at %d, want %d", k, s, iv-x.LeadMinutes/stepMinutes)
				} else if s > 0 && x.LastPowerMW != h.y[s-1] {
					t.Fatalf("feature %d: latest reading %v, want %v", k, x.LastPowerMW, h.y[s-1])
				}
				if x.Night {
					nights++
				}
			}
			if issued < len(h.feats)*9/10 {
				t.Fatalf("only %d of %d forecasts issued", issued, len(h.feats))
			}
			if pv := s.Kind == model.KindPV; pv != (nights > 0) {
				t.Fatalf("%d night forecasts for a %s site", nights, s.Kind)
			}
			if pv := s.Kind == model.KindPV; pv && (nights > issued/2 || nights < issued/5) {
				t.Fatalf("%d night forecasts of %d issued around the June solstice at 43 N", nights, issued)
			}
		})
	}
}
