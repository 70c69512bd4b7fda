package forest

import (
	"encoding/csv"
	"errors"
	"math"
	"math/rand/v2"
	"os"
	"slices"
	"strconv"
	"sync"
	"testing"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"github.com/plumb-forecast/plumb/model/score"
	"gonum.org/v1/gonum/stat/distuv"
)

// predict returns the forest's quantiles at levels for every row of X.
func predict(t testing.TB, f *Forest, X []float64, levels []float64) [][]float64 {
	t.Helper()
	p := f.Features()
	var s Scratch
	out := make([][]float64, len(X)/p)
	for i := range out {
		out[i] = make([]float64, len(levels))
		f.Quantiles(out[i], X[i*p:(i+1)*p], levels, &s)
	}
	return out
}

// fit is Fit that fails the test on error.
func fit(t testing.TB, X []float64, p int, y []float64, o Options) *Forest {
	t.Helper()
	f, err := Fit(X, p, y, o)
	if err != nil {
		t.Fatalf("Fit: %v", err)
	}
	return f
}

// heteroQuantile is the true conditional quantile of hetero's model.
func heteroQuantile(x []float64, level float64) float64 {
	return x[0] + (0.1+x[1])*distuv.UnitNormal.Quantile(level)
}

// TestSkillHeteroscedastic compares the forest's mean pinball loss over the
// levels 0.05..0.95 on held-out rows of y = x1 + (0.1 + x2) N(0, 1) with
// the oracle (the true conditional quantiles) and with the unconditional
// empirical quantiles of the training responses. Figures at the time of
// writing (computed, not published): forest 0.1824, oracle 0.1766,
// unconditional 0.3245 for n = 5000, p = 4.
func TestSkillHeteroscedastic(t *testing.T) {
	cases := []struct {
		name        string
		n, p        int
		o           Options
		maxOverOrac float64 // forest / oracle must stay below
		minUncOver  float64 // unconditional / forest must exceed
	}{
		{"defaults, 2 noise features", 5000, 4, Options{Seed: 7}, 1.06, 1.5},
		{"MinLeaf 10, subsampling 0.5", 5000, 4, Options{Seed: 7, MinLeaf: 10, SampleFraction: 0.5, WithoutReplacement: true}, 1.06, 1.5},
		{"6 noise features", 5000, 8, Options{Seed: 7}, 1.08, 1.5},
	}
	levels := grid(20)
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			X, y := hetero(c.n, c.p, 11)
			Xt, yt := hetero(4000, c.p, 12)
			f := fit(t, X, c.p, y, c.o)
			sy := slices.Sorted(slices.Values(y))
			pred := predict(t, f, Xt, levels)
			var lf, lo, lu float64
			for i, q := range pred {
				x := Xt[i*c.p : (i+1)*c.p]
				for k, l := range levels {
					lf += score.Pinball(q[k], yt[i], l)
					lo += score.Pinball(heteroQuantile(x, l), yt[i], l)
					lu += score.Pinball(sy[int(math.Ceil(l*float64(len(sy))))-1], yt[i], l)
				}
			}
			m := float64(len(yt) * len(levels))
			lf, lo, lu = lf/m, lo/m, lu/m
			t.Logf("mean pinball: forest %.4f, oracle %.4f, unconditional %.4f; forest/oracle %.3f, unconditional/forest %.3f", lf, lo, lu, lf/lo, lu/lf)
			if lf/lo > c.maxOverOrac {
				t.Errorf("forest/oracle = %.3f, want <= %.2f", lf/lo, c.maxOverOrac)
			}
			if lu/lf < c.minUncOver {
				t.Errorf("unconditional/forest = %.3f, want >= %.2f", lu/lf, c.minUncOver)
			}
		})
	}
}

// TestCoverage checks that the 0.1 and 0.9 quantiles enclose about 80 % of
// held-out responses, and that the interval adapts to the spread: the true
// 80 % interval is 2.43 times as wide, on average, where x2 > 0.5 as where
// x2 <= 0.5 ((0.1 + 0.75) / (0.1 + 0.25)). CART splits chase the mean, so
// the forest only partly follows the spread: per half, coverage was 0.84
// (quiet) and 0.74 (noisy) at the time of writing, which is logged, not
// asserted.
func TestCoverage(t *testing.T) {
	const p = 4
	X, y := hetero(5000, p, 21)
	Xt, yt := hetero(4000, p, 22)
	f := fit(t, X, p, y, Options{Seed: 3})
	pred := predict(t, f, Xt, []float64{0.9, 0.1}) // unsorted on purpose
	var in, n [2]int
	var width [2]float64
	for i, q := range pred {
		half := 0
		if Xt[i*p+1] > 0.5 {
			half = 1
		}
		n[half]++
		width[half] += q[0] - q[1]
		if yt[i] >= q[1] && yt[i] <= q[0] {
			in[half]++
		}
	}
	cov := float64(in[0]+in[1]) / float64(n[0]+n[1])
	ratio := (width[1] / float64(n[1])) / (width[0] / float64(n[0]))
	t.Logf("coverage of [q0.1, q0.9]: %.3f over %d rows; x2 <= 0.5: %.3f, x2 > 0.5: %.3f; width ratio %.2f (true 2.43)",
		cov, n[0]+n[1], float64(in[0])/float64(n[0]), float64(in[1])/float64(n[1]), ratio)
	if math.Abs(cov-0.8) > 0.03 {
		t.Errorf("coverage %.3f, want 0.8 +- 0.03", cov)
	}
	if ratio < 1.6 {
		t.Errorf("noisy/quiet interval width ratio %.2f, want >= 1.6 (true 2.43)", ratio)
	}
}

// TestDeterminism fits twice and compares predictions bit for bit.
func TestDeterminism(t *testing.T) {
	const p = 5
	X, y := hetero(2000, p, 31)
	Xt, _ := hetero(200, p, 32)
	levels := []float64{0.05, 0.25, 0.5, 0.75, 0.95}
	base := Options{Seed: 42, Trees: 30}
	ref := predict(t, fit(t, X, p, y, base), Xt, levels)
	withSeed := func(s uint64) Options { o := base; o.Seed = s; return o }
	withWorkers := func(w int) Options { o := base; o.Workers = w; return o }
	cases := []struct {
		name string
		o    Options
		same bool
	}{
		{"same seed", base, true},
		{"same seed, 2 workers", withWorkers(2), true},
		{"same seed, 7 workers", withWorkers(7), true},
		{"seed 43", withSeed(43), false},
		{"seed 0", withSeed(0), false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got := predict(t, fit(t, slices.Clone(X), p, slices.Clone(y), c.o), Xt, levels)
			diff := 0
			for i := range got {
				for k := range got[i] {
					if math.Float64bits(got[i][k]) != math.Float64bits(ref[i][k]) {
						diff++
					}
				}
			}
			if c.same && diff != 0 {
				t.Errorf("%d of %d predictions differ, want none", diff, len(got)*len(levels))
			}
			if !c.same && diff < len(got) {
				t.Errorf("only %d of %d predictions differ from seed 42's, want most", diff, len(got)*len(levels))
			}
		})
	}
}

// TestGolden pins the predictions of a forest grown on data made from
// integer arithmetic only (no math library calls), so that a different
// platform, Go version or refactoring that changed the forest shows here.
// The values were computed by this package when it was written; they are
// not published figures. NaN features are included so that the NaN rules
// are pinned too.
func TestGolden(t *testing.T) {
	const n, p = 400, 3
	src := rand.NewPCG(1, 2)
	unit := func() float64 { return float64(src.Uint64()>>11) / (1 << 53) }
	X := make([]float64, n*p)
	y := make([]float64, n)
	for i := range y {
		a, b, c := unit(), unit(), unit()
		X[i*p], X[i*p+1], X[i*p+2] = a, b, c
		if i%7 == 0 {
			X[i*p+1] = math.NaN()
		}
		y[i] = a + float64(b*(unit()-0.5)) // the conversion forbids a fused multiply-add
		if i%7 == 0 {
			y[i] += 0.5
		}
	}
	f := fit(t, X, p, y, Options{Seed: 9, Trees: 20})
	rows := [][]float64{{0.1, 0.2, 0.3}, {0.9, 0.9, 0.5}, {0.5, math.NaN(), 0.5}, {math.NaN(), math.NaN(), math.NaN()}}
	levels := []float64{0.1, 0.5, 0.9}
	want := [][]float64{
		{0.028078684826108834, 0.14199663472222357, 0.4051748238312921},
		{0.5220122644260803, 0.9206686097455825, 1.1257018290547909},
		{0.7081651206799526, 1.0871642046084202, 1.1224969330536099},
		{0.5111721142944088, 1.0393074257078927, 1.2466719267977062},
	}
	var s Scratch
	got := make([][]float64, len(rows))
	for i, x := range rows {
		got[i] = make([]float64, len(levels))
		f.Quantiles(got[i], x, levels, &s)
	}
	for i := range rows {
		for k := range levels {
			if math.Float64bits(got[i][k]) != math.Float64bits(want[i][k]) {
				t.Errorf("row %v level %v: got %v, want %v", rows[i], levels[k], got[i][k], want[i][k])
			}
		}
	}
}

// TestMonotoneInLevel asks for unsorted levels, near 0 and 1 included, and
// checks that the quantiles are ordered as the levels are, lie among the
// training responses and within their range.
func TestMonotoneInLevel(t *testing.T) {
	const p = 4
	X, y := hetero(3000, p, 41)
	Xt, _ := hetero(300, p, 42)
	cases := []struct {
		name   string
		o      Options
		levels []float64
	}{
		{"defaults", Options{Seed: 1}, []float64{0.5, 0.001, 0.999, 0.25, 0.75, 0.1, 0.9, 0.5000001, 1.0 / 3}},
		{"stumps", Options{Seed: 1, MaxDepth: 1}, []float64{0.9, 0.1, 0.3, 0.7, 0.5}},
		{"one tree", Options{Seed: 1, Trees: 1}, grid(100)},
	}
	sy := slices.Sorted(slices.Values(y))
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			f := fit(t, X, p, y, c.o)
			for i, q := range predict(t, f, Xt, c.levels) {
				for a := range c.levels {
					if _, ok := slices.BinarySearch(sy, q[a]); !ok {
						t.Fatalf("row %d: q(%v) = %v is not a training response", i, c.levels[a], q[a])
					}
					for b := range c.levels {
						if c.levels[a] < c.levels[b] && q[a] > q[b] {
							t.Fatalf("row %d: q(%v) = %v > q(%v) = %v", i, c.levels[a], q[a], c.levels[b], q[b])
						}
					}
				}
			}
		})
	}
}

// TestQuantileDefinition checks the estimator on cases small enough to
// work by hand: Q(tau) = inf{y : F(y | x) >= tau}, the estimator of
// Meinshausen 2006. With a root leaf (fewer than 2*MinLeaf rows) F is the
// empirical distribution of all responses; a stump grown on every row
// once splits them in two known halves.
func TestQuantileDefinition(t *testing.T) {
	t.Run("root leaf, n = 3", func(t *testing.T) {
		// F jumps by 1/3 at 1, 2 and 3.
		f := fit(t, []float64{0, 1, 2}, 1, []float64{3, 1, 2}, Options{Seed: 1, WithoutReplacement: true, Trees: 5})
		levels := []float64{0.2, 1.0 / 3, 0.34, 0.5, 2.0 / 3, 0.67, 0.99}
		want := []float64{1, 1, 2, 2, 2, 3, 3}
		got := make([]float64, len(levels))
		f.Quantiles(got, []float64{5}, levels, nil)
		if !slices.Equal(got, want) {
			t.Errorf("got %v, want %v", got, want)
		}
	})
	t.Run("one row", func(t *testing.T) {
		f := fit(t, []float64{1, 2}, 2, []float64{0.25}, Options{})
		got := make([]float64, 3)
		f.Quantiles(got, []float64{-1, math.NaN()}, []float64{0.01, 0.5, 0.99}, nil)
		if !slices.Equal(got, []float64{0.25, 0.25, 0.25}) {
			t.Errorf("got %v, want 0.25 at every level", got)
		}
	})
	t.Run("stump", func(t *testing.T) {
		// x = 0..9; y = x below 5 and 100 + x from 5: the split falls
		// midway, at 4.5, and each leaf holds five equally weighted rows.
		var X, y []float64
		for i := 0; i < 10; i++ {
			X = append(X, float64(i))
			y = append(y, float64(i)+100*float64(i/5))
		}
		f := fit(t, X, 1, y, Options{Trees: 1, MaxDepth: 1, MinLeaf: 1, WithoutReplacement: true})
		cases := []struct {
			x    float64
			want []float64 // at 0.1, 0.5, 0.9
		}{
			{2, []float64{0, 2, 4}},
			{4.5, []float64{0, 2, 4}},
			{math.Nextafter(4.5, 5), []float64{105, 107, 109}},
			{-1e300, []float64{0, 2, 4}},
			{math.Inf(1), []float64{105, 107, 109}},
			// No NaN in training: NaN follows the child with more rows,
			// the left one on a tie (five each here).
			{math.NaN(), []float64{0, 2, 4}},
		}
		for _, c := range cases {
			got := make([]float64, 3)
			f.Quantiles(got, []float64{c.x}, []float64{0.1, 0.5, 0.9}, nil)
			if !slices.Equal(got, c.want) {
				t.Errorf("x = %v: got %v, want %v", c.x, got, c.want)
			}
		}
	})
}

// TestNaNFeatures covers NaN in training and in prediction.
func TestNaNFeatures(t *testing.T) {
	const p = 3
	t.Run("informative missingness is learned", func(t *testing.T) {
		// x1 is missing on a third of the rows, and there y is 5 higher.
		X, y := hetero(3000, p, 51)
		for i := range y {
			if i%3 == 0 {
				X[i*p] = math.NaN()
				y[i] += 5
			}
		}
		f := fit(t, X, p, y, Options{Seed: 1})
		med := make([]float64, 1)
		for _, x1 := range []float64{0.5, 1.5, 2.5} {
			f.Quantiles(med, []float64{x1, 0.5, 0.5}, []float64{0.5}, nil)
			if med[0] > 4 {
				t.Errorf("x1 = %v: median %v, want near %v", x1, med[0], x1)
			}
		}
		f.Quantiles(med, []float64{math.NaN(), 0.5, 0.5}, []float64{0.5}, nil)
		// NaN rows have x1 ~ U(0, 3) behind the NaN: median about 1.5 + 5.
		if math.Abs(med[0]-6.5) > 0.5 {
			t.Errorf("x1 = NaN: median %v, want about 6.5", med[0])
		}
	})
	cases := []struct {
		name  string
		train func(X []float64) // sets NaN in the training features
		query []float64
	}{
		{"NaN in a query only", func([]float64) {}, []float64{math.NaN(), 0.5, 0.5}},
		{"every query feature NaN", func([]float64) {}, []float64{math.NaN(), math.NaN(), math.NaN()}},
		{"all-NaN training column", func(X []float64) {
			for i := 2; i < len(X); i += p {
				X[i] = math.NaN()
			}
		}, []float64{1, 0.5, 7}},
		{"scattered NaN in training and query", func(X []float64) {
			for i := 0; i < len(X); i += 5 {
				X[i] = math.NaN()
			}
		}, []float64{1, math.NaN(), 0.5}},
		{"infinite features", func(X []float64) {
			for i := 0; i < len(X); i += 11 {
				X[i] = math.Inf(1 - 2*(i%2))
			}
		}, []float64{math.Inf(-1), math.Inf(1), 0.5}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			X, y := hetero(2000, p, 52)
			c.train(X)
			f := fit(t, X, p, y, Options{Seed: 2, Trees: 20})
			levels := []float64{0.1, 0.5, 0.9}
			q := make([]float64, 3)
			f.Quantiles(q, c.query, levels, nil)
			lo, hi := slices.Min(y), slices.Max(y)
			for k := range q {
				if !(q[k] >= lo && q[k] <= hi) || (k > 0 && q[k] < q[k-1]) {
					t.Fatalf("quantiles %v at %v: want ordered values in [%v, %v]", q, levels, lo, hi)
				}
			}
		})
	}
}

// TestFitErrors feeds bad data and options.
func TestFitErrors(t *testing.T) {
	X, y := hetero(20, 2, 61)
	nanY := slices.Clone(y)
	nanY[3] = math.NaN()
	infY := slices.Clone(y)
	infY[0] = math.Inf(-1)
	cases := []struct {
		name string
		X    []float64
		p    int
		y    []float64
		o    Options
		want error
	}{
		{"no rows", nil, 2, nil, Options{}, ErrEmpty},
		{"no rows, X given", X, 2, []float64{}, Options{}, ErrEmpty},
		{"p = 0", X, 0, y, Options{}, ErrInput},
		{"p < 0", X, -2, y, Options{}, ErrInput},
		{"len(X) != n*p", X[:len(X)-1], 2, y, Options{}, ErrInput},
		{"p wrong for X", X, 3, y, Options{}, ErrInput},
		{"NaN response", X, 2, nanY, Options{}, ErrInput},
		{"infinite response", X, 2, infY, Options{}, ErrInput},
		{"negative Trees", X, 2, y, Options{Trees: -1}, ErrOptions},
		{"negative MinLeaf", X, 2, y, Options{MinLeaf: -1}, ErrOptions},
		{"MaxFeatures > p", X, 2, y, Options{MaxFeatures: 3}, ErrOptions},
		{"negative MaxFeatures", X, 2, y, Options{MaxFeatures: -1}, ErrOptions},
		{"SampleFraction > 1", X, 2, y, Options{SampleFraction: 1.5}, ErrOptions},
		{"negative SampleFraction", X, 2, y, Options{SampleFraction: -0.5}, ErrOptions},
		{"NaN SampleFraction", X, 2, y, Options{SampleFraction: math.NaN()}, ErrOptions},
		{"negative MaxDepth", X, 2, y, Options{MaxDepth: -3}, ErrOptions},
		{"negative Workers", X, 2, y, Options{Workers: -1}, ErrOptions},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			f, err := Fit(c.X, c.p, c.y, c.o)
			if !errors.Is(err, c.want) {
				t.Fatalf("err = %v, want %v", err, c.want)
			}
			if f != nil {
				t.Errorf("got a forest with an error")
			}
			t.Logf("%v", err)
		})
	}
}

// TestQuantilesPanics checks that misuse by the caller panics.
func TestQuantilesPanics(t *testing.T) {
	X, y := hetero(50, 2, 71)
	f := fit(t, X, 2, y, Options{Trees: 3})
	cases := []struct {
		name           string
		dst, x, levels []float64
	}{
		{"short x", make([]float64, 1), []float64{1}, []float64{0.5}},
		{"long x", make([]float64, 1), []float64{1, 2, 3}, []float64{0.5}},
		{"dst shorter than levels", make([]float64, 1), []float64{1, 2}, []float64{0.1, 0.5}},
		{"level 0", make([]float64, 1), []float64{1, 2}, []float64{0}},
		{"level 1", make([]float64, 1), []float64{1, 2}, []float64{1}},
		{"level NaN", make([]float64, 1), []float64{1, 2}, []float64{math.NaN()}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Errorf("no panic")
				}
			}()
			f.Quantiles(c.dst, c.x, c.levels, nil)
		})
	}
}

// TestDefaults checks that zero options mean the documented defaults.
func TestDefaults(t *testing.T) {
	const p = 7
	X, y := hetero(1000, p, 81)
	Xt, _ := hetero(100, p, 82)
	levels := []float64{0.1, 0.5, 0.9}
	zero := fit(t, X, p, y, Options{Seed: 5})
	explicit := fit(t, X, p, y, Options{Seed: 5, Trees: 100, MinLeaf: 5, MaxFeatures: 3, SampleFraction: 1, Workers: 1})
	if zero.Trees() != 100 || zero.Features() != p || zero.Rows() != 1000 {
		t.Errorf("Trees, Features, Rows = %d, %d, %d; want 100, %d, 1000", zero.Trees(), zero.Features(), zero.Rows(), p)
	}
	if a, b := predict(t, zero, Xt, levels), predict(t, explicit, Xt, levels); !slices.EqualFunc(a, b, slices.Equal) {
		t.Errorf("zero options and explicit defaults give different forests")
	}
}

// TestStructure checks invariants of the grown trees: every tree's leaves
// hold each training row exactly once (all n rows, in-bag or not: the
// weights of Meinshausen 2006 run over all n observations), in ascending
// order of response; MinLeaf holds when every row is sampled once; MaxDepth
// bounds the depth.
func TestStructure(t *testing.T) {
	const p = 4
	X, y := hetero(1500, p, 91)
	cases := []struct {
		name    string
		o       Options
		minLeaf int // least rows per leaf that must hold, 1 if MinLeaf does not bind
		depth   int // largest depth allowed, 0 for any
	}{
		{"bootstrap", Options{Seed: 1, Trees: 10}, 1, 0},
		{"every row once, MinLeaf 7", Options{Seed: 1, Trees: 10, MinLeaf: 7, WithoutReplacement: true}, 7, 0},
		{"MaxDepth 3", Options{Seed: 1, Trees: 10, MaxDepth: 3}, 1, 3},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			f := fit(t, X, p, y, c.o)
			n := f.Rows()
			for tr := 0; tr < f.trees; tr++ {
				seen := make([]bool, n)
				var walk func(i int32, depth int)
				walk = func(i int32, depth int) {
					nd := f.nodes[i]
					if c.depth > 0 && depth > c.depth {
						t.Fatalf("tree %d: node at depth %d", tr, depth)
					}
					if nd.kid >= 0 {
						walk(nd.kid, depth+1)
						walk(nd.kid+1, depth+1)
						return
					}
					l := ^nd.kid
					ranks := f.ranks[f.bounds[l]:f.bounds[l+1]]
					if len(ranks) < c.minLeaf {
						t.Fatalf("tree %d: leaf of %d rows, want >= %d", tr, len(ranks), c.minLeaf)
					}
					if !slices.IsSorted(ranks) {
						t.Fatalf("tree %d: leaf ranks not ascending", tr)
					}
					for _, r := range ranks {
						if seen[r] {
							t.Fatalf("tree %d: row of rank %d in two leaves", tr, r)
						}
						seen[r] = true
					}
				}
				walk(f.roots[tr], 0)
				if i := slices.Index(seen, false); i >= 0 {
					t.Fatalf("tree %d: row of rank %d in no leaf", tr, i)
				}
			}
		})
	}
}

// TestQuantilesAllocs checks that a warmed Scratch makes Quantiles
// allocation-free.
func TestQuantilesAllocs(t *testing.T) {
	const p = 4
	X, y := hetero(2000, p, 101)
	Xt, _ := hetero(64, p, 102)
	f := fit(t, X, p, y, Options{Seed: 1, Trees: 50})
	levels := grid(100)
	dst := make([]float64, len(levels))
	var s Scratch
	for i := 0; i < 64; i++ {
		f.Quantiles(dst, Xt[i*p:(i+1)*p], levels, &s)
	}
	i := 0
	allocs := testing.AllocsPerRun(200, func() {
		f.Quantiles(dst, Xt[i*p:(i+1)*p], levels, &s)
		i = (i + 1) % 64
	})
	if allocs != 0 {
		t.Errorf("Quantiles allocates %v times per call, want 0", allocs)
	}
}

// TestConcurrentUse queries one forest from several goroutines while a new
// forest is fitted on another, as the forecaster does; run with -race.
func TestConcurrentUse(t *testing.T) {
	const p = 4
	X, y := hetero(2000, p, 111)
	Xt, _ := hetero(100, p, 112)
	levels := []float64{0.1, 0.5, 0.9}
	old := fit(t, X, p, y, Options{Seed: 1, Trees: 20})
	want := predict(t, old, Xt, levels)

	var wg sync.WaitGroup
	var refit *Forest
	var refitErr error
	wg.Add(1)
	go func() {
		defer wg.Done()
		refit, refitErr = Fit(X, p, y, Options{Seed: 2, Trees: 20, Workers: 2})
	}()
	got := make([][][]float64, 3)
	for g := range got {
		wg.Add(1)
		go func() {
			defer wg.Done()
			got[g] = predict(t, old, Xt, levels)
		}()
	}
	wg.Wait()
	if refitErr != nil || refit == nil {
		t.Fatalf("concurrent Fit: %v", refitErr)
	}
	for g := range got {
		if !slices.EqualFunc(got[g], want, slices.Equal) {
			t.Errorf("goroutine %d: predictions differ from sequential ones", g)
		}
	}
}

// TestEngel fits a one-feature forest of food expenditure on income to the
// Engel data (235 households; Koenker and Bassett 1978, METHODS.md
// section 3) and checks that the median curve rises with income. There is
// no published forest value to compare with; the linear median regression
// of METHODS.md section 3 (81.48225 + 0.56018 income, R quantreg
// documentation) is only logged beside it.
func TestEngel(t *testing.T) {
	path := sharedtest.Data(t, "reference/engel.csv")
	fh, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer fh.Close()
	recs, err := csv.NewReader(fh).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) < 2 || recs[0][0] != "income" || recs[0][1] != "foodexp" {
		t.Fatalf("%s: want columns income, foodexp, got %v", path, recs[0])
	}
	var income, food []float64
	for _, r := range recs[1:] {
		a, err1 := strconv.ParseFloat(r[0], 64)
		b, err2 := strconv.ParseFloat(r[1], 64)
		if err1 != nil || err2 != nil {
			t.Fatalf("%s: bad row %v", path, r)
		}
		income, food = append(income, a), append(food, b)
	}
	if len(income) != 235 {
		t.Fatalf("%d households, want 235 (README of shared/data)", len(income))
	}
	f := fit(t, income, 1, food, Options{Seed: 1})
	sorted := slices.Sorted(slices.Values(income))
	// Medians at the income deciles.
	var med []float64
	q := make([]float64, 1)
	for d := 1; d <= 9; d++ {
		x := sorted[d*len(sorted)/10]
		f.Quantiles(q, []float64{x}, []float64{0.5}, nil)
		med = append(med, q[0])
		t.Logf("income %7.1f: forest median %6.1f, linear median regression %6.1f", x, q[0], 81.48225+0.56018*x)
	}
	rises := 0
	for k := 1; k < len(med); k++ {
		if med[k] > med[k-1] {
			rises++
		}
	}
	if rises < 7 || med[8] < 1.5*med[0] {
		t.Errorf("median curve %v: want it to rise (at least 7 of 8 steps up, top decile >= 1.5 x bottom)", med)
	}
}
