package conformal

import (
	"math"
	"testing"
	"time"
)

func TestTieHit(t *testing.T) {
	levels := []float64{0.1, 0.5, 0.9}
	// No tie: plain comparison.
	q := []float64{1, 2, 3}
	if !TieHit(levels, q, 1, 1.5, 0.99) || TieHit(levels, q, 0, 1.5, 0) {
		t.Fatal("plain comparison wrong")
	}
	// One quantile equal to y inside the grid: a hit whatever u.
	if !TieHit(levels, q, 1, 2, 0.99) {
		t.Fatal("single equal quantile should be a hit")
	}
	// Every quantile 0 and y = 0 (PV at night): the PIT is uniform on
	// [0, 1], so level tau is hit for u <= tau.
	z := []float64{0, 0, 0}
	for j, l := range levels {
		if !TieHit(levels, z, j, 0, l-1e-9) || TieHit(levels, z, j, 0, l+1e-9) {
			t.Fatalf("level %v: tie broken wrongly", l)
		}
	}
	// Over many draws a point mass is covered at the level's rate.
	q = []float64{0, 0, 5} // F(0) is taken as 0.5, the last level whose quantile is 0
	hits := 0
	const n = 100000
	at := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	for i := range n {
		if TieHit(levels, q, 0, 0, TieDraw(7, at.Add(time.Duration(i)*time.Hour), 0)) {
			hits++
		}
	}
	// The PIT spans [0, 0.5): level 0.1 is hit with probability 0.1/0.5.
	if got := float64(hits) / n; math.Abs(got-0.2) > 0.005 {
		t.Fatalf("tie coverage %.4f, want 0.2", got)
	}
}

func TestTieDrawUniform(t *testing.T) {
	at := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	var bins [10]int
	for i := range 100000 {
		u := TieDraw(3, at.Add(time.Duration(i)*15*time.Minute), i%8)
		if u < 0 || u >= 1 {
			t.Fatalf("draw %v outside [0, 1)", u)
		}
		bins[int(u*10)]++
	}
	for k, c := range bins {
		if c < 9500 || c > 10500 {
			t.Fatalf("bin %d holds %d of 100000 draws", k, c)
		}
	}
	if TieDraw(3, at, 1) != TieDraw(3, at, 1) {
		t.Fatal("not deterministic")
	}
}
