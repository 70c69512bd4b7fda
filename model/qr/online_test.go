package qr

import (
	"bytes"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/plumb-forecast/plumb/model/score"
)

// engelPasses is how many passes over the Engel data (235 households, so
// 47 000 updates) the online learner gets; each pass visits the households
// in a new order drawn from a fixed-seed generator.
const engelPasses = 200

// trainEngel runs a default Online learner over the Engel data with income
// multiplied by incomeScale and returns its summed pinball loss on the data.
func trainEngel(income, food []float64, tau, incomeScale float64) float64 {
	n := len(food)
	m := NewOnline(2, tau, OnlineOptions{})
	rng := rand.New(rand.NewPCG(2026, 3))
	idx := make([]int, n)
	for i := range idx {
		idx[i] = i
	}
	x := make([]float64, 2)
	for pass := 0; pass < engelPasses; pass++ {
		rng.Shuffle(n, func(a, b int) { idx[a], idx[b] = idx[b], idx[a] })
		for _, i := range idx {
			x[0], x[1] = 1, income[i]*incomeScale
			m.Update(x, food[i])
		}
	}
	loss := 0.0
	for i := range food {
		x[0], x[1] = 1, income[i]*incomeScale
		loss += score.Pinball(m.Predict(x), food[i], tau)
	}
	return loss
}

// TestOnlineEngelWithinOnePercentMethodsSection3 holds the online learner,
// with default options, to the summed pinball loss of the exact solution
// on the Engel data: within 1 % after enough passes (METHODS.md section 3;
// optimum from the R quantreg documentation, Koenker and Bassett 1978), at
// each of the five levels, with income in its own units and rescaled by
// 1000 and by 0.001 (the learner is scale-free: no option changes).
func TestOnlineEngelWithinOnePercentMethodsSection3(t *testing.T) {
	income, food := engel(t)
	for _, scale := range []float64{1, 1000, 0.001} {
		for _, c := range engelTable {
			loss := trainEngel(income, food, c.tau, scale)
			excess := loss/c.loss - 1
			t.Logf("income x %-5v tau %.2f: online loss %.4f, optimum %.4f (METHODS.md section 3), excess %+.3f %%", scale, c.tau, loss, c.loss, 100*excess)
			if excess > 0.01 {
				t.Errorf("income x %v tau %v: online loss %v is %.2f %% above the optimum %v (METHODS.md section 3), want within 1 %%", scale, c.tau, loss, 100*excess, c.loss)
			}
		}
	}
}

// stream is an invented site: the output y (MW) is 0.8 times a driver z in
// [0, 40] MW plus an offset and Normal noise of 2 MW; the offset jumps from
// 1 to 7 MW (3 noise standard deviations) at update jumpAt.
type stream struct {
	rng    *rand.Rand
	t      int
	jumpAt int
}

func (s *stream) next(x []float64) (y, offset float64) {
	offset = 1.0
	if s.t >= s.jumpAt {
		offset = 7
	}
	s.t++
	z := 40 * s.rng.Float64()
	x[0], x[1] = 1, z
	return offset + 0.8*z + 2*s.rng.NormFloat64(), offset
}

// TestOnlineTracksInterceptJump feeds an invented drifting stream: after
// the jump the share of outcomes at or below the prediction must come back
// near tau (Angelopoulos, Candes and Tibshirani 2023, METHODS.md section 4:
// a quantile tracker's coverage converges to tau), while a learner frozen
// at the jump stays off.
func TestOnlineTracksInterceptJump(t *testing.T) {
	const total, jumpAt, settle = 10000, 5000, 1500
	cases := []struct {
		name     string
		tau, tol float64
	}{
		{"lower tail", 0.05, 0.015},
		{"median", 0.5, 0.03},
		{"upper tail", 0.95, 0.015},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			m := NewOnline(2, c.tau, OnlineOptions{})
			var frozen Online
			s := &stream{rng: rand.New(rand.NewPCG(42, 1)), jumpAt: jumpAt}
			x := make([]float64, 2)
			var before, after, frozenAfter, nBefore, nAfter float64
			for i := 0; i < total; i++ {
				if i == jumpAt {
					blob, err := m.MarshalBinary()
					if err != nil {
						t.Fatal(err)
					}
					if err := frozen.UnmarshalBinary(blob); err != nil {
						t.Fatal(err)
					}
				}
				y, _ := s.next(x)
				q := m.Predict(x)
				switch {
				case i >= jumpAt-2000 && i < jumpAt:
					nBefore++
					if y <= q {
						before++
					}
				case i >= jumpAt+settle:
					nAfter++
					if y <= q {
						after++
					}
					if y <= frozen.Predict(x) {
						frozenAfter++
					}
				}
				m.Update(x, y)
			}
			before, after, frozenAfter = before/nBefore, after/nAfter, frozenAfter/nAfter
			t.Logf("tau %.2f: coverage %.4f in the 2000 updates before the jump, %.4f from %d updates after it to the end (%d updates); frozen at the jump: %.4f",
				c.tau, before, after, settle, int(nAfter), frozenAfter)
			if math.Abs(before-c.tau) > c.tol {
				t.Errorf("coverage before the jump %v, want %v +- %v", before, c.tau, c.tol)
			}
			if math.Abs(after-c.tau) > c.tol {
				t.Errorf("coverage after the jump %v, want %v +- %v", after, c.tau, c.tol)
			}
			if math.Abs(frozenAfter-c.tau) < 3*c.tol {
				t.Errorf("a learner frozen at the jump has coverage %v, near tau %v: the jump does not test tracking", frozenAfter, c.tau)
			}
		})
	}
}

// TestOnlineFeatureScaleInvariantNAG: multiplying a feature by c > 0 leaves
// every prediction unchanged (Ross, Mineiro and Langford 2013, the
// invariance NAG is built for), and multiplying y by c multiplies every
// prediction by c (this package's residual scale).
func TestOnlineFeatureScaleInvariantNAG(t *testing.T) {
	for _, c := range []float64{1000, 0.001, 3.7} {
		for _, o := range []OnlineOptions{{}, {Memory: -1, Average: -1}} {
			base := NewOnline(2, 0.8, o)
			xs := NewOnline(2, 0.8, o)
			ys := NewOnline(2, 0.8, o)
			s := &stream{rng: rand.New(rand.NewPCG(5, 6)), jumpAt: 3000}
			x := make([]float64, 2)
			xc := make([]float64, 2)
			worst := 0.0
			for i := 0; i < 6000; i++ {
				y, _ := s.next(x)
				xc[0], xc[1] = x[0], x[1]*c
				qb, qx, qy := base.Predict(x), xs.Predict(xc), ys.Predict(x)
				if i > 0 {
					worst = math.Max(worst, math.Abs(qx-qb)/math.Abs(qb))
					worst = math.Max(worst, math.Abs(qy-c*qb)/math.Abs(c*qb))
				}
				base.Update(x, y)
				xs.Update(xc, y)
				ys.Update(x, c*y)
			}
			if worst > 1e-9 {
				t.Errorf("c = %v, options %+v: predictions differ by up to %.3g relative", c, o, worst)
			}
		}
	}
}

// TestOnlineIgnoresNonFinite: an Update with NaN or an infinity in x or y
// changes nothing; Predict with NaN in x gives NaN.
func TestOnlineIgnoresNonFinite(t *testing.T) {
	m := NewOnline(3, 0.3, OnlineOptions{})
	rng := rand.New(rand.NewPCG(1, 2))
	for i := 0; i < 500; i++ {
		z := rng.Float64()
		m.Update([]float64{1, z, z * z}, 2*z+rng.NormFloat64())
	}
	want, _ := m.MarshalBinary()
	nan, inf := math.NaN(), math.Inf(1)
	cases := []struct {
		name string
		x    []float64
		y    float64
	}{
		{"NaN y", []float64{1, 0.5, 0.25}, nan},
		{"+Inf y", []float64{1, 0.5, 0.25}, inf},
		{"-Inf y", []float64{1, 0.5, 0.25}, -inf},
		{"NaN in x", []float64{1, nan, 0.25}, 1},
		{"Inf in x", []float64{1, 0.5, inf}, 1},
		{"NaN everywhere", []float64{nan, nan, nan}, nan},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			m.Update(c.x, c.y)
			got, _ := m.MarshalBinary()
			if !bytes.Equal(got, want) {
				t.Error("state changed")
			}
			if m.Updates() != 500 {
				t.Errorf("Updates() = %d, want 500", m.Updates())
			}
		})
	}
	if q := m.Predict([]float64{1, nan, 0}); !math.IsNaN(q) {
		t.Errorf("Predict with NaN = %v, want NaN", q)
	}
}

func TestNewOnlineOptions(t *testing.T) {
	cases := []struct {
		name                    string
		o                       OnlineOptions
		rate                    float64
		memory, average         int64
		predictUsesLatestWeight bool
	}{
		{"zero means defaults", OnlineOptions{}, DefaultRate, DefaultMemory, DefaultAverage, false},
		{"negative means off", OnlineOptions{Rate: 0.5, Memory: -1, Average: -3}, 0.5, -1, -1, true},
		{"explicit", OnlineOptions{Rate: 2, Memory: 100, Average: 10}, 2, 100, 10, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			m := NewOnline(2, 0.5, c.o)
			if m.rate != c.rate || m.memory != c.memory || m.average != c.average {
				t.Errorf("rate %v memory %v average %v, want %v %v %v", m.rate, m.memory, m.average, c.rate, c.memory, c.average)
			}
			m.Update([]float64{1, 2}, 3)
			m.Update([]float64{1, 1}, 5)
			latest := m.w[0]*1 + m.w[1]*1
			if got := m.Predict([]float64{1, 1}); (got == latest) != c.predictUsesLatestWeight {
				t.Errorf("Predict %v, latest weights give %v", got, latest)
			}
		})
	}
}

func TestNewOnlinePanicsOnMisuse(t *testing.T) {
	cases := []struct {
		name string
		p    int
		tau  float64
		o    OnlineOptions
	}{
		{"p zero", 0, 0.5, OnlineOptions{}},
		{"tau zero", 1, 0, OnlineOptions{}},
		{"tau one", 1, 1, OnlineOptions{}},
		{"tau NaN", 1, math.NaN(), OnlineOptions{}},
		{"negative rate", 1, 0.5, OnlineOptions{Rate: -1}},
		{"NaN rate", 1, 0.5, OnlineOptions{Rate: math.NaN()}},
		{"infinite rate", 1, 0.5, OnlineOptions{Rate: math.Inf(1)}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("no panic")
				}
			}()
			NewOnline(c.p, c.tau, c.o)
		})
	}
	t.Run("wrong length", func(t *testing.T) {
		defer func() {
			if recover() == nil {
				t.Error("no panic")
			}
		}()
		NewOnline(2, 0.5, OnlineOptions{}).Predict([]float64{1})
	})
}

// TestOnlineZeroAllocs: Predict and Update do not allocate.
func TestOnlineZeroAllocs(t *testing.T) {
	m := NewOnline(8, 0.9, OnlineOptions{})
	x := []float64{1, 2, 3, 4, 5, 6, 7, 8}
	y := 10.0
	if a := testing.AllocsPerRun(1000, func() {
		y = -y
		m.Update(x, y)
	}); a != 0 {
		t.Errorf("Update: %v allocs per run, want 0", a)
	}
	if a := testing.AllocsPerRun(1000, func() { _ = m.Predict(x) }); a != 0 {
		t.Errorf("Predict: %v allocs per run, want 0", a)
	}
}

func BenchmarkOnline(b *testing.B) {
	for _, p := range []int{2, 8, 32} {
		x := make([]float64, p)
		for i := range x {
			x[i] = float64(i + 1)
		}
		m := NewOnline(p, 0.9, OnlineOptions{})
		b.Run("Update/p="+itoa(p), func(b *testing.B) {
			b.ReportAllocs()
			y := 1.0
			for b.Loop() {
				y = -y
				m.Update(x, y)
			}
		})
		b.Run("Predict/p="+itoa(p), func(b *testing.B) {
			b.ReportAllocs()
			s := 0.0
			for b.Loop() {
				s += m.Predict(x)
			}
			_ = s
		})
	}
}

// TestOnlineWeightsPredict: Predict is the sum of Weights times x, added in
// order, bit for bit, with and without averaging (the Stack reads the
// weights once per refresh and predicts with them).
func TestOnlineWeightsPredict(t *testing.T) {
	for _, avg := range []int{0, -1} {
		m := NewOnline(3, 0.7, OnlineOptions{Average: avg})
		r := rand.New(rand.NewPCG(5, 6))
		w := make([]float64, 3)
		for i := range 500 {
			x := []float64{1, r.NormFloat64(), 3 * r.Float64()}
			m.Weights(w)
			want := 0.0
			for j := range x {
				want += w[j] * x[j]
			}
			if got := m.Predict(x); math.Float64bits(got) != math.Float64bits(want) {
				t.Fatalf("average %d, update %d: Predict %v, weights give %v", avg, i, got, want)
			}
			m.Update(x, 2*x[1]+x[2]+r.NormFloat64())
		}
	}
	defer func() {
		if recover() == nil {
			t.Error("Weights with a short dst did not panic")
		}
	}()
	NewOnline(3, 0.5, OnlineOptions{}).Weights(make([]float64, 2))
}
