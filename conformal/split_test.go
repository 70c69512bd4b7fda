package conformal

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
)

// TestSplitRank holds the split-conformal index to METHODS.md section 4
// (Romano, Patterson and Candes 2019) [paper]: k = ceil((n + 1)(1 - alpha));
// n = 100, alpha = 0.1 gives k = 91; k > n means an infinite threshold, so
// alpha = 0.1 needs n >= 9 and alpha = 0.05 needs n >= 19.
func TestSplitRank(t *testing.T) {
	cases := []struct {
		name     string
		n        int
		alpha    float64
		k        int
		infinite bool
	}{
		{"METHODS.md s4 n=100 alpha=0.1", 100, 0.1, 91, false},
		{"METHODS.md s4 n=8 alpha=0.1 is infinite", 8, 0.1, 9, true},
		{"METHODS.md s4 n=9 alpha=0.1 is the shortest", 9, 0.1, 9, false},
		{"METHODS.md s4 n=18 alpha=0.05 is infinite", 18, 0.05, 19, true},
		{"METHODS.md s4 n=19 alpha=0.05 is the shortest", 19, 0.05, 19, false},
		{"n=0", 0, 0.5, 1, true},
		{"n=3 alpha=0.5: ceil(2)", 3, 0.5, 2, false},
		{"n=99 alpha=0.45: 55 though 100*(1-0.45) computes to 55.00000000000001", 99, 0.45, 55, false},
		{"n=19 alpha=0.95: 1 though 20*(1-0.95) computes to 1.0000000000000009", 19, 0.95, 1, false},
		{"n=4 alpha=0.9: ceil(0.5)", 4, 0.9, 1, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			k := SplitRank(c.n, c.alpha)
			if k != c.k || (k > c.n) != c.infinite {
				t.Errorf("SplitRank(%d, %v) = %d, want %d (infinite %v)", c.n, c.alpha, k, c.k, c.infinite)
			}
		})
	}
	for _, bad := range []struct {
		n     int
		alpha float64
	}{{-1, 0.1}, {10, 0}, {10, 1}, {10, math.NaN()}} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("SplitRank(%d, %v) did not panic", bad.n, bad.alpha)
				}
			}()
			SplitRank(bad.n, bad.alpha)
		}()
	}
}

// feedScores feeds Split the scores as outcomes of a forecaster whose raw
// quantile is 0: the issued value is the offset, so each score is Y.
func feedScores(s *Split, scores ...float64) {
	for _, sc := range scores {
		_, off := s.Adjust()
		s.Update(Outcome{Y: sc, Issued: off, PIT: math.NaN()})
	}
}

// TestSplitOffsetIsOrderStatistic: with n = 100 scores 1..100 (shuffled) the
// offset at level 0.9 is the 91st smallest, 91 (METHODS.md section 4), and at
// level 0.1 the mirror rank 101 - 91 = 10.
func TestSplitOffsetIsOrderStatistic(t *testing.T) {
	scores := make([]float64, 100)
	for i := range scores {
		scores[i] = float64(i + 1)
	}
	rand.New(rand.NewPCG(1, 2)).Shuffle(len(scores), func(i, j int) { scores[i], scores[j] = scores[j], scores[i] })
	cases := []struct {
		name  string
		level float64
		want  float64
	}{
		{"upper, level 0.9: rank 91", 0.9, 91},
		{"lower, level 0.1: rank 10", 0.1, 10},
		{"median, level 0.5: rank ceil(50.5) = 51", 0.5, 51},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := NewSplit(c.level, SplitOptions{Window: 100})
			feedScores(s, scores...)
			if l, off := s.Adjust(); l != c.level || off != c.want {
				t.Errorf("Adjust = (%v, %v), want (%v, %v)", l, off, c.level, c.want)
			}
			// Once full, a new score drops the oldest.
			feedScores(s, 1000)
			k := SplitRank(100, min(c.level, 1-c.level))
			if c.level < 0.5 {
				k = 101 - k
			}
			window := append(slices.Clone(scores[1:]), 1000)
			slices.Sort(window)
			if _, off := s.Adjust(); off != window[k-1] {
				t.Errorf("after one more score offset %v, want %v", off, window[k-1])
			}
		})
	}
}

// TestSplitWarmUpAndShortWindow: a window too short for the level gives the
// honest infinite offset (n = 8 at alpha = 0.1, METHODS.md section 4); a long
// enough window issues the raw quantile (offset 0) until it holds the scores
// the level needs, 9 at level 0.9.
func TestSplitWarmUpAndShortWindow(t *testing.T) {
	for _, c := range []struct {
		level float64
		inf   float64
	}{{0.9, math.Inf(1)}, {0.1, math.Inf(-1)}} {
		s := NewSplit(c.level, SplitOptions{Window: 8})
		for i := range 20 {
			if _, off := s.Adjust(); off != c.inf {
				t.Fatalf("level %v window 8, after %d outcomes offset %v, want %v", c.level, i, off, c.inf)
			}
			// What the actor issues for an infinite offset: the quantile
			// clipped to the capacity (or zero); no score can be taken.
			s.Update(Outcome{Y: float64(i), Issued: 10, PIT: math.NaN()})
		}
		if s.Len() != 0 {
			t.Errorf("level %v: %d scores taken off an infinite offset", c.level, s.Len())
		}
	}
	s := NewSplit(0.9, SplitOptions{})
	for i := range 8 {
		if _, off := s.Adjust(); off != 0 {
			t.Fatalf("after %d scores offset %v, want 0 while the window fills", i, off)
		}
		feedScores(s, float64(i+1))
	}
	feedScores(s, -5) // nine scores: -5, 1..8; k = 9, the largest
	if _, off := s.Adjust(); off != 8 {
		t.Errorf("with nine scores offset %v, want the 9th smallest, 8", off)
	}
}

// TestSplitScoreUsesOffsetOfLastAdjust: the raw quantile is taken as the
// issued value less the offset of the last Adjust, also for outcomes settled
// without an Adjust in between (delayed feedback).
func TestSplitScoreUsesOffsetOfLastAdjust(t *testing.T) {
	s := NewSplit(0.9, SplitOptions{Window: 20})
	feedScores(s, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10) // offset now 10 (k = 10 of 10)
	_, off := s.Adjust()
	if off != 10 {
		t.Fatalf("offset %v, want 10", off)
	}
	// Two outcomes of forecasts issued at raw quantile 100 with offset 10.
	s.Update(Outcome{Y: 100 + 11, Issued: 110, PIT: math.NaN()}) // score 11
	// Score 12, where the offset now in force (11, the 11th of 11 scores)
	// would give 13.
	s.Update(Outcome{Y: 100 + 12, Issued: 110, PIT: math.NaN()})
	b, _ := s.MarshalBinary()
	var r Split
	if err := r.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	got := make([]float64, r.Len())
	for i := range got {
		got[i] = r.scores.at(i)
	}
	if want := []float64{1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12}; !slices.Equal(got, want) {
		t.Errorf("scores %v, want %v", got, want)
	}
}

// TestSplitCoverageIsRankOverNPlusOne: on i.i.d. outcomes the rolling
// window's scores and the next are exchangeable, so P(Y <= q + offset) is
// exactly k / (n + 1) (Romano, Patterson and Candes 2019) [paper]: with
// n = 9, level 0.85 gives k = 9 and coverage 0.9, above the level by the
// discreteness; level 0.15 the mirror rank 10 - 9 = 1 and coverage 0.1.
func TestSplitCoverageIsRankOverNPlusOne(t *testing.T) {
	cases := []struct {
		name  string
		level float64
		n     int
		want  float64
	}{
		{"n=9 level 0.85: 9/10", 0.85, 9, 0.9},
		{"n=9 level 0.15: 1/10", 0.15, 9, 0.1},
		{"n=19 level 0.95: 19/20", 0.95, 19, 0.95},
		{"n=99 level 0.5: 50/100", 0.5, 99, 0.5},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			rng := rand.New(rand.NewPCG(3, math.Float64bits(c.level)))
			rn := normalRun(40000, 0, func(int) float64 { return 0.3 + 1.5*rng.NormFloat64() })
			res := rn.play(NewSplit(c.level, SplitOptions{Window: c.n}))
			// 40000 dependent steps: allow 1 point.
			if cov := res.coverage(1000, 40000); math.Abs(cov-c.want) > 0.01 {
				t.Errorf("coverage %.4f, want %v", cov, c.want)
			}
		})
	}
}

func TestSplitIgnoresUnknownOutcomes(t *testing.T) {
	s := NewSplit(0.9, SplitOptions{})
	feedScores(s, 1, 2)
	for _, o := range []Outcome{{Y: math.NaN(), Issued: 1}, {Y: 1, Issued: math.NaN()}, {Y: 1, Issued: math.Inf(-1)}} {
		s.Update(o)
	}
	if s.Len() != 2 {
		t.Errorf("%d scores, want 2", s.Len())
	}
}

func TestSplitOptionsErrors(t *testing.T) {
	for _, w := range []int{-1, MaxWindow + 1} {
		_, err := New(0.5, Options{Method: "split", Split: SplitOptions{Window: w}})
		if err == nil || !strings.Contains(err.Error(), fmt.Sprintf("split window %d", w)) {
			t.Errorf("window %d: err %v", w, err)
		}
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("NewSplit with window %d did not panic", w)
				}
			}()
			NewSplit(0.5, SplitOptions{Window: w})
		}()
	}
	if s := NewSplit(0.5, SplitOptions{}); s.Window() != 500 || s.Name() != "split" || s.Level() != 0.5 {
		t.Errorf("window %d, name %q, level %v; want 500, split, 0.5", s.Window(), s.Name(), s.Level())
	}
}

// TestSortedRing compares the ring with a slice kept the slow way.
func TestSortedRing(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 5))
	for _, n := range []int{1, 2, 7, 64} {
		r := newSortedRing(n)
		var ref []float64
		for i := range 500 {
			v := float64(rng.IntN(5)) - 2 // many ties
			if i%11 == 0 {
				v = math.Copysign(0, -1)
			}
			r.push(v)
			ref = append(ref, v+0)
			if len(ref) > n {
				ref = ref[1:]
			}
			sorted := slices.Sorted(slices.Values(ref))
			if !slices.Equal(r.sorted, sorted) {
				t.Fatalf("n=%d push %d: sorted %v, want %v", n, i, r.sorted, sorted)
			}
			for j := range ref {
				if r.at(j) != ref[j] {
					t.Fatalf("n=%d push %d: at(%d) = %v, want %v", n, i, j, r.at(j), ref[j])
				}
			}
			for k := 1; k <= len(ref); k++ {
				if r.kth(k) != sorted[k-1] {
					t.Fatalf("kth(%d) = %v, want %v", k, r.kth(k), sorted[k-1])
				}
			}
			for _, v := range r.sorted {
				if v == 0 && math.Signbit(v) {
					t.Fatal("-0 stored")
				}
			}
		}
	}
	// Type-7 quantiles of 1..5 [computed]: h = 4 l, so 0.05 -> 1.2,
	// 0.5 -> 3, 0.95 -> 4.8.
	r := newSortedRing(5)
	for _, v := range []float64{5, 3, 1, 4, 2} {
		r.push(v)
	}
	for _, c := range []struct{ l, want float64 }{{0.05, 1.2}, {0.5, 3}, {0.95, 4.8}, {0, 1}, {1, 5}} {
		if got := r.quantile(c.l); !near(got, c.want, 1e-12) {
			t.Errorf("quantile(%v) = %v, want %v", c.l, got, c.want)
		}
	}
}

func TestSplitStateRefusesBadData(t *testing.T) {
	s := NewSplit(0.5, SplitOptions{Window: 4})
	feedScores(s, 1, 2)
	if s.Len() != 2 {
		t.Fatalf("%d scores, want 2", s.Len())
	}
	good, _ := s.MarshalBinary()
	with := func(at int, v []byte) []byte {
		b := bytes.Clone(good)
		copy(b[at:], v)
		return b
	}
	cases := []struct {
		name string
		data []byte
		want string
	}{
		{"empty", nil, "empty"},
		{"unknown version", with(0, []byte{2}), "unknown version 2"},
		{"short header", good[:10], "want at least"},
		{"missing score", good[:len(good)-8], "want"},
		{"level", with(1, appendFloat(nil, -1)), "level"},
		{"window 0", with(9, appendUint32(nil, 0)), "window 0"},
		{"more scores than window", with(21, appendUint32(nil, 5)), "5 scores in a window of 4"},
		{"NaN offset", with(13, appendFloat(nil, math.NaN())), "offset is NaN"},
		{"infinite score", with(25, appendFloat(nil, math.Inf(1))), "score +Inf"},
		{"-0 score", with(25, appendFloat(nil, math.Copysign(0, -1))), "-0"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := NewSplit(0.5, SplitOptions{})
			err := r.UnmarshalBinary(c.data)
			if !errors.Is(err, ErrState) || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v, want one wrapping ErrState that says %q", err, c.want)
			}
			if r.Level() != 0.5 || r.Len() != 0 || r.Window() != 500 {
				t.Error("a failed restore changed the calibrator")
			}
		})
	}
}

// FuzzSplitUnmarshal: the decoder never panics, and a state it accepts
// encodes back to the same bytes.
func FuzzSplitUnmarshal(f *testing.F) {
	s := NewSplit(0.5, SplitOptions{Window: 3})
	feedScores(s, 1, 2, 3, 4)
	good, _ := s.MarshalBinary()
	f.Add(good)
	f.Add([]byte{1, 0})
	f.Fuzz(func(t *testing.T, data []byte) {
		var r Split
		if !roundTrip(t, &r, data) {
			return
		}
	})
}

// TestNewCalibratorsDoNotAllocate holds Adjust and Update of the three
// calibrators to zero allocations.
func TestNewCalibratorsDoNotAllocate(t *testing.T) {
	cals := []Calibrator{
		NewTracker(0.9, TrackerOptions{Window: 50}),
		NewDtACI(0.9, DtACIOptions{}),
		NewSplit(0.9, SplitOptions{Window: 50}),
	}
	for _, c := range cals {
		t.Run(c.Name(), func(t *testing.T) {
			i := 0
			fn := func() {
				l, off := c.Adjust()
				pit := math.NaN()
				if i%2 == 0 {
					pit = float64(i%10) / 10
				}
				c.Update(Outcome{Y: float64(i%10) / 10, Issued: l + off, PIT: pit})
				i++
			}
			for range 200 { // past the windows' fill
				fn()
			}
			if n := testing.AllocsPerRun(1000, fn); n != 0 {
				t.Errorf("%v allocations per Adjust+Update, want 0", n)
			}
		})
	}
}

func BenchmarkSplitUpdateAdjust(b *testing.B) {
	for _, w := range []int{100, 500, 5000} {
		b.Run(fmt.Sprintf("window=%d", w), func(b *testing.B) {
			s := NewSplit(0.9, SplitOptions{Window: w})
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				l, off := s.Adjust()
				s.Update(Outcome{Y: float64(i%97) / 10, Issued: l + off, PIT: math.NaN()})
				i++
			}
		})
	}
}
