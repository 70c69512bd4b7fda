package conformal

import (
	"fmt"
	"math"
)

// DefaultGamma is the ACI step size used when ACIOptions.Gamma is zero.
// It was 0.005 (the value of Gibbs and Candes's experiments, as we recall
// it) until backtests on the open data sets (intraday view, stack
// forecaster) showed what the step costs: serf-pv-15min pinball loss +3.9 %
// over the raw model at 0.005, +1.4 % at 0.003, +0.3 % at 0.002, with the
// long-run coverage of every level within 1 point in every bucket but the
// last at 0.003 as at 0.005 (0.010 at 0.002); GEFCom2014 solar -2.4 % and
// -2.3 %, GEFCom2012 wind +1.5 % and +0.8 %.
const DefaultGamma = 0.003

// ACIOptions configures an ACI calibrator. The zero value is the default.
type ACIOptions struct {
	// Gamma is the step size of the miss-rate update. Zero means
	// DefaultGamma (0.003); a larger step reacts faster to a change and
	// makes the issued level noisier. It must be positive and finite.
	Gamma float64
}

// ACI is adaptive conformal inference (Gibbs and Candes, NeurIPS 2021) for
// one level tau of a one-sided quantile forecast, as in METHODS.md section 4.
//
// The prediction set at step t is (-Inf, q_t], where q_t is the forecaster's
// quantile at level 1 - alpha_t. A miss is err_t = 1{y_t > q_t}; the target
// miss rate is alpha = 1 - tau; after each outcome
//
//	alpha_{t+1} = alpha_t + gamma (alpha - err_t),  alpha_1 = alpha.
//
// alpha_t may leave [0, 1]: Adjust then asks for the level 1 - alpha_t at or
// beyond 0 or 1, which the forecaster answers with -Inf or +Inf (an empty set,
// always a miss, or everything, never a miss). For every T and any sequence
// of outcomes the realised miss rate obeys the deterministic bound
// |mean(err_1..T) - alpha| <= (max(alpha_1, 1 - alpha_1) + gamma) / (gamma T)
// (see ACIBound).
//
// Delayed feedback is the caller's business: the outcome of a forecast made
// h ahead settles h later, so the site actor keeps one ACI per (lead bucket,
// level) and updates each only when an outcome of a forecast it adjusted
// settles, which is the per-horizon scheme of METHODS.md section 4
// (alpha_{t+h|t} = alpha_{t+h-1|t-1} + gamma (alpha - err_{t|t-h})).
//
// The zero ACI is not usable: build one with NewACI or restore one with
// UnmarshalBinary. An ACI is not safe for concurrent use.
type ACI struct {
	level  float64 // tau, the target coverage
	gamma  float64
	alphaT float64 // alpha_t, the miss rate the next forecast is issued at
}

// NewACI returns an ACI calibrator for the quantile level tau = level, which
// must lie in (0, 1). It panics on a level outside (0, 1) or a negative, NaN
// or infinite Gamma (programmer misuse; the factory New returns an error).
func NewACI(level float64, o ACIOptions) *ACI {
	if err := checkLevel(level); err != nil {
		panic(err.Error())
	}
	gamma, err := aciGamma(o.Gamma)
	if err != nil {
		panic(err.Error())
	}
	return &ACI{level: level, gamma: gamma, alphaT: 1 - level}
}

// aciGamma resolves the default step size and checks it.
func aciGamma(g float64) (float64, error) {
	if g == 0 {
		return DefaultGamma, nil
	}
	if !(g > 0) || math.IsInf(g, 0) {
		return 0, fmt.Errorf("conformal: aci gamma %v must be positive and finite", g)
	}
	return g, nil
}

// validLevel reports whether a level or target coverage lies in (0, 1) with
// 1 - level distinguishable from 1 (a level below about 1.1e-16 is not).
func validLevel(level float64) bool {
	return level > 0 && level < 1 && 1-level < 1
}

// checkLevel reports a level that is not valid.
func checkLevel(level float64) error {
	if !validLevel(level) {
		return fmt.Errorf("conformal: level %v is outside (0, 1)", level)
	}
	return nil
}

// Name returns "aci".
func (a *ACI) Name() string { return MethodACI }

// Adjust returns the level 1 - alpha_t at which to ask the forecaster for its
// quantile, and a zero offset. The level may be at or beyond 0 or 1.
func (a *ACI) Adjust() (level, offset float64) { return 1 - a.alphaT, 0 }

// Update feeds one settled outcome: err = 1 when o.Y > o.Issued, and
// alpha_{t+1} = alpha_t + gamma w (alpha - err), w = o.Weight (1 when
// unset). Summed over T outcomes the steps telescope, as in Gibbs and
// Candes's proof of the bound:
//
//	sum_t w_t (err_t - alpha) = (alpha_1 - alpha_{T+1}) / gamma,
//
// so the weighted miss rate obeys the bound of ACIBound with T the sum of
// the weights, for weights at most 1 (our derivation; with larger ones the
// gamma in the bound's numerator becomes gamma max(w)). An outcome whose Y
// or Issued is NaN carries no hit or miss and is ignored.
func (a *ACI) Update(o Outcome) {
	if math.IsNaN(o.Y) || math.IsNaN(o.Issued) {
		return
	}
	err := 0.0
	if !o.Hit() {
		err = 1
	}
	a.alphaT += a.gamma * o.weight() * ((1 - a.level) - err)
}

// Alpha returns alpha_t, the miss rate the next forecast will be issued at.
// Its distance from the target 1 - level shows how hard the calibrator is
// correcting the forecaster.
func (a *ACI) Alpha() float64 { return a.alphaT }

// Level returns the target level tau.
func (a *ACI) Level() float64 { return a.level }

// Gamma returns the step size in use.
func (a *ACI) Gamma() float64 { return a.gamma }

// ACIBound returns the deterministic bound of Gibbs and Candes (2021) on the
// distance between the realised miss rate over t steps and the target:
// (max(alpha1, 1 - alpha1) + gamma) / (gamma t), for alpha1 in [0, 1].
// It panics unless gamma > 0 and t >= 1.
func ACIBound(alpha1, gamma float64, t int) float64 {
	if !(gamma > 0) || t < 1 {
		panic("conformal: ACIBound needs gamma > 0 and t >= 1")
	}
	return (math.Max(alpha1, 1-alpha1) + gamma) / (gamma * float64(t))
}

// aciStateLen is the length of a version-1 ACI state: the version byte and
// three float64 (level, gamma, alpha_t).
const aciStateLen = 1 + 3*8

// MarshalBinary encodes the calibrator's state: a version byte (1), then the
// level, the step size and alpha_t as little-endian IEEE 754 doubles.
func (a *ACI) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, aciStateLen)
	b = append(b, stateVersion)
	b = appendFloat(b, a.level)
	b = appendFloat(b, a.gamma)
	b = appendFloat(b, a.alphaT)
	return b, nil
}

// UnmarshalBinary replaces the calibrator's state with one written by
// MarshalBinary; the restored calibrator behaves exactly as the one saved.
// It refuses an unknown version, a wrong length and values no ACI can hold,
// with an error wrapping ErrState, and leaves a unchanged then.
func (a *ACI) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("aci", data, aciStateLen)
	if err != nil {
		return err
	}
	level, gamma, alphaT := r.float(), r.float(), r.float()
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: aci: level %v is outside (0, 1)", ErrState, level)
	}
	if !(gamma > 0) || math.IsInf(gamma, 0) {
		return fmt.Errorf("%w: aci: gamma %v is not positive and finite", ErrState, gamma)
	}
	if math.IsNaN(alphaT) || math.IsInf(alphaT, 0) {
		return fmt.Errorf("%w: aci: alpha_t %v is not finite", ErrState, alphaT)
	}
	a.level, a.gamma, a.alphaT = level, gamma, alphaT
	return nil
}

// Correction returns what Adjust would return now, without its side
// effects (see Corrector).
func (a *ACI) Correction() (level, offset float64) { return 1 - a.alphaT, 0 }
