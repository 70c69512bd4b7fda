// Package score holds the scores of probabilistic forecasts that plumb
// reports and learns from: the pinball (quantile) loss, CRPS and the
// interval score, as written in METHODS.md sections 3 and 5.
//
// All scores are negatively oriented (lower is better) and in the unit of
// the forecast variable (MW for power). Functions take no ownership of their
// slice arguments and do not allocate. Misuse by the caller (mismatched
// lengths, a level or significance outside (0, 1), a negative spread)
// panics with a message prefixed "score:"; NaN inputs give NaN.
package score

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// Pinball returns the pinball (quantile) loss of the quantile forecast q at
// level tau for the outcome y:
//
//	rho_tau(q, y) = tau (y - q)        if y >= q,
//	                (1 - tau) (q - y)  otherwise.
//
// It is zero when y = q and its expectation over y is smallest at the true
// tau-quantile. tau must lie in [0, 1]; it panics otherwise.
func Pinball(q, y, tau float64) float64 {
	if !(tau >= 0 && tau <= 1) {
		panic("score: Pinball needs a level in [0, 1]")
	}
	if y >= q {
		return tau * (y - q)
	}
	if y < q {
		return (1 - tau) * (q - y)
	}
	return math.NaN() // q or y is NaN
}

// MeanPinball returns the mean pinball loss of the quantiles q[j] at
// levels[j] for one outcome y. It panics if the slices differ in length or
// are empty, or a level lies outside [0, 1].
func MeanPinball(q []float64, levels []float64, y float64) float64 {
	if len(q) != len(levels) || len(q) == 0 {
		panic("score: MeanPinball needs as many quantiles as levels, at least one")
	}
	var sum float64
	for j, tau := range levels {
		sum += Pinball(q[j], y, tau)
	}
	return sum / float64(len(q))
}

// CRPSQuantiles approximates the continuous ranked probability score of the
// forecast distribution given by its quantiles q[j] at levels[j], for the
// outcome y, as twice the mean pinball loss:
//
//	CRPS(F, y) = 2 * integral over tau in (0, 1) of rho_tau(F^-1(tau), y)
//	           ~ 2 * MeanPinball(q, levels, y).
//
// The mean stands for the integral, which is a fair approximation only when
// the levels form an even grid over (0, 1), such as 1/n, ..., (n-1)/n (see
// model.LevelGrid); it is a Riemann sum of the integrand at those levels,
// and it leaves out the tails beyond the outermost levels. With the 99
// levels 0.01..0.99 of N(0, 1) it gives 0.235912 at y = 0 against the exact
// 0.233695 (METHODS.md section 5). The levels are not checked for evenness.
// It panics as MeanPinball does.
func CRPSQuantiles(q, levels []float64, y float64) float64 {
	return 2 * MeanPinball(q, levels, y)
}

// CRPSNormal returns the continuous ranked probability score of the normal
// distribution N(mu, sigma^2) for the outcome y, in closed form (Gneiting,
// Raftery, Westveld and Goldman, Monthly Weather Review 133, 2005):
//
//	CRPS = sigma [z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi)],  z = (y - mu)/sigma.
//
// With sigma = 0 the forecast is the point mu and the score is |y - mu|. It
// panics on a negative sigma.
func CRPSNormal(mu, sigma, y float64) float64 {
	if sigma < 0 {
		panic("score: CRPSNormal needs sigma >= 0")
	}
	if sigma == 0 {
		return math.Abs(y - mu)
	}
	z := (y - mu) / sigma
	n := distuv.UnitNormal
	return sigma * (z*(2*n.CDF(z)-1) + 2*n.Prob(z) - 1/math.Sqrt(math.Pi))
}

// IntervalScore returns the interval (Winkler) score of the central
// prediction interval [l, u] at significance alpha (nominal coverage
// 1 - alpha) for the outcome y:
//
//	(u - l) + (2/alpha)(l - y) 1{y < l} + (2/alpha)(y - u) 1{y > u}.
//
// It rewards narrow intervals and charges 2/alpha per unit an outcome falls
// outside. The formula is applied as written, so a crossed interval (l > u)
// is not an error and earns a negative width. It panics unless
// 0 < alpha < 1.
func IntervalScore(l, u, y, alpha float64) float64 {
	if !(alpha > 0 && alpha < 1) {
		panic("score: IntervalScore needs alpha in (0, 1)")
	}
	s := u - l
	if y < l {
		s += 2 / alpha * (l - y)
	}
	if y > u {
		s += 2 / alpha * (y - u)
	}
	return s
}
