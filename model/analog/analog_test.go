package analog

import (
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"testing"
)

// TestNearestOnALine: outcomes equal to the predictor; the 3 analogs of
// 5.2 are the cases 4, 5 and 6, whose median is 5 (worked by hand).
func TestNearestOnALine(t *testing.T) {
	var X, y []float64
	for i := range 11 {
		X, y = append(X, float64(i)), append(y, float64(i))
	}
	a, err := Fit(X, 1, y, Options{K: 3})
	if err != nil {
		t.Fatal(err)
	}
	dst := make([]float64, 4)
	a.Quantiles(dst, []float64{5.2}, []float64{0, 0.5, 0.75, 1})
	if !math.IsInf(dst[0], -1) || dst[1] != 5 || dst[2] != 5.5 || !math.IsInf(dst[3], 1) {
		t.Errorf("quantiles %v, want -Inf 5 5.5 +Inf", dst)
	}
}

// TestMatchesBruteForce compares the heap's choice with a full sort of
// the distances on random cases with missing values.
func TestMatchesBruteForce(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	const n, p, k = 500, 4, 25
	X, y := make([]float64, n*p), make([]float64, n)
	for i := range X {
		X[i] = rng.NormFloat64() * float64(1+i%p)
		if rng.IntN(40) == 0 {
			X[i] = math.NaN()
		}
	}
	for i := range y {
		y[i] = X[i*p] + rng.NormFloat64()
	}
	a, err := Fit(X, p, y, Options{K: k})
	if err != nil {
		t.Fatal(err)
	}
	levels := []float64{0.1, 0.5, 0.9}
	got := make([]float64, len(levels))
	for q := range 20 {
		x := []float64{rng.NormFloat64(), rng.NormFloat64() * 2, math.NaN(), rng.NormFloat64() * 4}
		a.Quantiles(got, x, levels)
		type cand struct {
			d float64
			i int
		}
		var cs []cand
		for i := range n {
			d := 0.0
			for j := range p {
				w := (x[j]-a.mean[j])*a.inv[j] - float64(a.x[i*p+j])
				if math.IsNaN(w) {
					d += missing
				} else {
					d += w * w
				}
			}
			cs = append(cs, cand{d, i})
		}
		sort.SliceStable(cs, func(i, j int) bool { return cs[i].d < cs[j].d })
		var vals []float64
		for _, c := range cs[:k] {
			vals = append(vals, y[c.i])
		}
		slices.Sort(vals)
		for j, l := range levels {
			h := l * float64(k-1)
			lo := int(h)
			want := vals[lo] + (h-float64(lo))*(vals[lo+1]-vals[lo])
			if math.Abs(got[j]-want) > 1e-12 {
				t.Fatalf("case %d level %v: %v, want %v", q, l, got[j], want)
			}
		}
	}
}
