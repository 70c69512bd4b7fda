// Package conformal keeps a site's live quantiles calibrated: online
// calibrators that learn from delayed outcomes, the coverage monitor, the
// coverage tests and the alarm state machine.
//
// One calibrator serves one (site, lead bucket, level) and is updated only
// when an outcome of a forecast it adjusted settles, which for a lead time h
// is h later than the forecast: the delayed-feedback setting of METHODS.md
// section 4. Calibrators are not safe for concurrent use; the site actor
// that owns them serialises access.
package conformal

import "math"

// Calibrator adjusts one level of a forecaster's raw quantiles so that the
// share of outcomes at or below the issued quantile tracks the target level.
//
// Every implementation must pass the conformance suite in
// conformal/conformaltest.
type Calibrator interface {
	// Name identifies the method ("aci", "none", ...).
	Name() string
	// Adjust returns the level at which to ask the forecaster for a quantile
	// and an offset in MW to add to its answer. A level at or below 0 asks
	// for -Inf, at or above 1 for +Inf.
	Adjust() (level, offset float64)
	// Update feeds one settled outcome of a forecast this calibrator adjusted.
	Update(o Outcome)
}

// Corrector is implemented by calibrators that can tell the correction
// Adjust would return now without Adjust's side effects (Split notes the
// offset it issued): the coverage monitor's readout of the calibrator's
// work. Every calibrator of this package implements it; the conformance
// suite holds Correction to Adjust's answer.
type Corrector interface {
	Correction() (level, offset float64)
}

// Outcome is one settled forecast of one level.
type Outcome struct {
	// Y is the observed mean power (MW).
	Y float64
	// Issued is the quantile published for the level (after the offset,
	// sorting and clipping; an outcome tied with a clipped quantile is
	// judged by conformal.TieHit and Issued nudged below Y when it counts
	// as a miss). Y <= Issued is a hit.
	Issued float64
	// PIT is the raw forecast's cumulative probability at Y (0..1),
	// interpolated on its grid of levels; NaN when unknown.
	PIT float64
	// Lag is how many updates this calibrator took between the issue of
	// the forecast and this outcome: 0 when none (the zero value), a
	// negative number when unknown. Only calibrators whose state moves per
	// expert need it (DtACI judges each expert at the miss rate it had at
	// issue); the others ignore it.
	Lag int
	// Weight is how many issued forecasts this outcome stands for,
	// relative to the calibrator's usual: the worker keeps one forecast
	// per target interval and lead bucket, drawn from those it issued for
	// it, so a target issued twice as often as usual counts twice (a
	// Horvitz-Thompson weight; the worker truncates it to [2/3, 3/2]). The
	// zero value counts as 1, as does any weight that is not positive and
	// finite; one above MaxWeight counts as MaxWeight. ACI and the
	// tracker scale their steps by it, so that their long-run guarantees
	// hold for every forecast issued, not only for the ones kept; dtaci
	// and split ignore it.
	Weight float64
}

// MaxWeight is the largest weight an outcome counts with
// (Outcome.Weight).
const MaxWeight = 4

// weight returns o.Weight, 1 where it is not positive and finite, at most
// MaxWeight.
func (o Outcome) weight() float64 {
	if o.Weight > 0 && !math.IsInf(o.Weight, 0) {
		return min(o.Weight, MaxWeight)
	}
	return 1
}

// Hit reports whether the outcome lies at or below the issued quantile.
func (o Outcome) Hit() bool { return o.Y <= o.Issued }
