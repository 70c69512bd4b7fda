package conformal

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// Kupiec is the unconditional coverage test of Kupiec (1995) as written in
// METHODS.md section 5: with x = misses out of T = n forecasts and nominal
// miss rate p,
//
//	LR = -2[(T-x) ln(1-p) + x ln p] + 2[(T-x) ln(1-x/T) + x ln(x/T)],
//
// with 0 ln 0 = 0 (so x = 0 and x = T are fine), and pValue is the chance
// that a chi-square variable with 1 degree of freedom exceeds LR. A small
// p-value says the observed miss rate x/T is unlikely under the rate p.
//
// For the quantile at level tau the miss rate p is 1 - tau. It panics unless
// n >= 1, 0 <= misses <= n and 0 < p < 1.
func Kupiec(misses, n int, p float64) (lr, pValue float64) {
	if n < 1 || misses < 0 || misses > n || !(p > 0 && p < 1) {
		panic("conformal: Kupiec needs n >= 1, 0 <= misses <= n and 0 < p < 1")
	}
	t, x := float64(n), float64(misses)
	null := xlogy(t-x, 1-p) + xlogy(x, p)
	alt := xlogy(t-x, 1-x/t) + xlogy(x, x/t)
	lr = math.Max(0, 2*(alt-null)) // rounding can leave a tiny negative
	return lr, chiSquare1Survival(lr)
}

// TransitionCounts are the day-to-day transitions of a miss sequence: Nij
// counts the steps in state i followed by a step in state j, where 1 is a
// miss and 0 a hit.
type TransitionCounts struct {
	N00, N01, N10, N11 int
}

// Transitions counts the transitions of a miss sequence (true = miss).
func Transitions(miss []bool) TransitionCounts {
	var c TransitionCounts
	for i := 1; i < len(miss); i++ {
		c.add(miss[i-1], miss[i])
	}
	return c
}

// add counts one transition from state prev to state cur.
func (c *TransitionCounts) add(prev, cur bool) {
	switch {
	case !prev && !cur:
		c.N00++
	case !prev && cur:
		c.N01++
	case prev && !cur:
		c.N10++
	default:
		c.N11++
	}
}

// Test is the Christoffersen (1998) independence test on the counts: the
// likelihood ratio of a first-order Markov chain (miss probabilities pi01
// after a hit and pi11 after a miss) against independent misses with one
// probability pi, and its p-value under a chi-square with 1 degree of
// freedom (METHODS.md section 5). Terms 0 ln 0 count as 0. Without any
// transition it returns (0, 1).
func (c TransitionCounts) Test() (lr, pValue float64) {
	n00, n01, n10, n11 := float64(c.N00), float64(c.N01), float64(c.N10), float64(c.N11)
	total := n00 + n01 + n10 + n11
	if total == 0 {
		return 0, 1
	}
	pi := (n01 + n11) / total
	pi01 := n01 / (n00 + n01) // NaN when no hit precedes; its terms are then 0
	pi11 := n11 / (n10 + n11)
	null := xlogy(n00+n10, 1-pi) + xlogy(n01+n11, pi)
	alt := xlogy(n00, 1-pi01) + xlogy(n01, pi01) + xlogy(n10, 1-pi11) + xlogy(n11, pi11)
	lr = math.Max(0, 2*(alt-null))
	return lr, chiSquare1Survival(lr)
}

// Christoffersen runs the independence test on a miss sequence (true = miss,
// oldest first) and returns its statistic, p-value and transition counts.
// Misses that cluster (a miss makes the next one likelier) give a small
// p-value even when the overall miss rate is right.
func Christoffersen(miss []bool) (lr, pValue float64, c TransitionCounts) {
	c = Transitions(miss)
	lr, pValue = c.Test()
	return lr, pValue, c
}

// xlogy returns x ln y, with 0 ln y = 0 for any y.
func xlogy(x, y float64) float64 {
	if x == 0 {
		return 0
	}
	return x * math.Log(y)
}

// chiSquare1Survival is P(X > x) for X chi-square with 1 degree of freedom.
func chiSquare1Survival(x float64) float64 {
	return distuv.ChiSquared{K: 1}.Survival(x)
}
