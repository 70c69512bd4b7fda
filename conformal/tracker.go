package conformal

import (
	"fmt"
	"math"
	"strings"
)

// scaleHi is the upper level of the spread B_t: the errors' 95% less
// their 5% quantile.
const scaleHi = 0.95

// Defaults of TrackerOptions.
const (
	// DefaultTrackerLR is the step size as a share of the recent spread of
	// the errors Y - Issued.
	DefaultTrackerLR = 0.003
	// DefaultTrackerKI is the integrator gain, in units of that spread.
	DefaultTrackerKI = 1.0
	// DefaultTrackerCsat is the saturation constant of the integrator, the
	// value of the conformal PID authors' experiment configurations.
	DefaultTrackerCsat = 5.0
	// DefaultTrackerWindow is the number of recent errors the spread is
	// taken over.
	DefaultTrackerWindow = 500
	// DefaultTrackerMinScale is the floor of the spread, in MW.
	DefaultTrackerMinScale = 1e-3
)

// TrackerOptions configures a Tracker. The zero value is the default: a
// scale-free step of 0.003 times the spread of the last 500 errors, and the
// integrator on with gain 1 and saturation constant 5.
type TrackerOptions struct {
	// LR is the step size as a share of the scale B_t, the spread of the
	// errors Y - Issued among the last Window outcomes (their 95% less their
	// 5% quantile, at least MinScale): eta_t = LR * B_t, so no step needs
	// tuning in MW per site. Zero means DefaultTrackerLR (0.003). It must be
	// positive and finite. Ignored when Eta is set. See Tracker for the
	// bound delayed feedback puts on it.
	LR float64
	// Eta fixes the step size in MW instead (eta_t = Eta). Zero means the
	// scale-free step LR * B_t; it must not be negative, NaN or infinite.
	Eta float64
	// KI is the gain of the integrator, in units of B_t. Zero means
	// DefaultTrackerKI (1); a negative value turns the integrator off. It
	// must be finite.
	KI float64
	// Csat is the saturation constant of the integrator. Zero means
	// DefaultTrackerCsat (5); it must be positive and finite.
	Csat float64
	// Window is the number of recent errors B_t is taken over. Zero means
	// DefaultTrackerWindow (500); it must lie in [1, MaxWindow].
	Window int
	// MinScale is the floor of B_t in MW, which keeps the tracker moving
	// when the recent errors are all equal (a plant at zero output). Zero
	// means DefaultTrackerMinScale (0.001 MW); it must be positive and
	// finite.
	MinScale float64
}

// resolve fills in the defaults and checks the options.
func (o TrackerOptions) resolve() (TrackerOptions, error) {
	def := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	def(&o.LR, DefaultTrackerLR)
	def(&o.KI, DefaultTrackerKI)
	def(&o.Csat, DefaultTrackerCsat)
	def(&o.MinScale, DefaultTrackerMinScale)
	if o.Window == 0 {
		o.Window = DefaultTrackerWindow
	}
	positive := func(v float64) bool { return v > 0 && !math.IsInf(v, 0) }
	switch {
	case !positive(o.LR):
		return o, fmt.Errorf("conformal: pid lr %v must be positive and finite", o.LR)
	case !(o.Eta >= 0) || math.IsInf(o.Eta, 0):
		return o, fmt.Errorf("conformal: pid eta %v must be zero or positive and finite", o.Eta)
	case math.IsNaN(o.KI) || math.IsInf(o.KI, 0):
		return o, fmt.Errorf("conformal: pid ki %v must be finite", o.KI)
	case !positive(o.Csat):
		return o, fmt.Errorf("conformal: pid csat %v must be positive and finite", o.Csat)
	case !positive(o.MinScale):
		return o, fmt.Errorf("conformal: pid min scale %v must be positive and finite", o.MinScale)
	case o.Window < 1 || o.Window > MaxWindow:
		return o, fmt.Errorf("conformal: pid window %d is outside [1, %d]", o.Window, MaxWindow)
	}
	if o.KI < 0 {
		o.KI = 0
	}
	return o, nil
}

// Tracker is quantile tracking with an integrator, the P and I parts of
// conformal PID control (Angelopoulos, Candes and Tibshirani, NeurIPS 2023;
// METHODS.md section 4), acting on an additive offset in MW to the
// forecaster's quantile at the level tau.
//
// With err_t = 1{Y_t > Issued_t} and the target miss rate alpha = 1 - tau,
// after each outcome
//
//	p_{t+1} = p_t + eta_t w_t (err_t - alpha),   p_1 = 0      (P: quantile tracking)
//	S_t     = sum over s <= t of w_s (err_s - alpha)
//	r_t     = KI B_t tanh(S_t log(t+1) / (Csat (t+1)))    (I: integrator)
//	offset  = p_{t+1} + r_t
//
// # Step size
//
// The step is scale-free, as in the authors' code, which sets it to a
// learning rate times the range (largest less smallest) of the recent scores:
// here eta_t = LR B_t, where B_t is the spread of the errors d = Y - Issued
// of the last Window outcomes, the current one included, floored at
// MinScale. The errors stand for the scores Y - q of the raw quantile q,
// shifted by the offset in force, which a spread mostly ignores. Ours is the
// distance between the 5% and 95% empirical quantiles of d rather than the
// range, which a single bad meter reading would inflate for a whole window.
//
// Delayed feedback bounds the step: when an outcome settles h updates after
// its forecast, the loop q -> coverage -> q is stable only while eta_t f is
// below about pi / (2h + 1), f being the density of Y at the quantile (the
// linearised loop is x_{t+1} = x_t - k x_{t-h}, stable for
// k < 2 sin(pi / (2 (2h + 1))): a classical result, recalled); past
// that the offset oscillates, and as the oscillation widens the spread B_t
// the step grows with it. For normal errors B_t f is about 1.3 at the median,
// and in our simulations (N(0, 1) outcomes, 20000 steps) the default LR of
// 0.003 stays stable with feedback delayed by up to 288 updates, 0.005 up to
// 144, while 0.01 diverges at 144. Error distributions with a sharper peak
// than the normal need a smaller LR.
//
// # Integrator
//
// The integrator's argument is the authors' (the accumulated coverage error
// times log(t+1) / (Csat (t+1))), but its saturating function is ours:
// KI B_t tanh(.) in place of their KI tan(.), which grows without bound and
// can make the offset infinite. Ours is bounded by KI B_t and scaled like the
// step, so it needs no tuning in MW either; it pushes the long-run coverage
// back to the target after a transient such as a shift. With bounded scores
// the P part alone keeps |mean(1{Y <= Issued}) - tau| <= (B + eta) / (eta T)
// for a fixed step (METHODS.md section 4).
//
// w_t is the outcome's Outcome.Weight (1 when unset), as for ACI.
//
// Delayed feedback is otherwise handled as for ACI: one Tracker per (lead
// bucket, level), updated as each of its outcomes settles.
//
// The zero Tracker is not usable: build one with NewTracker or restore one
// with UnmarshalBinary. A Tracker is not safe for concurrent use.
type Tracker struct {
	level float64
	o     TrackerOptions // resolved
	errs  sortedRing     // recent Y - Issued
	p     float64        // the P part of the offset
	sum   float64        // S_t
	n     uint64         // t, the outcomes counted
	scale float64        // B_t after the last outcome
	off   float64        // p + r, what Adjust returns
}

// NewTracker returns a Tracker for the level tau = level in (0, 1). It
// panics on a level outside (0, 1) or invalid options (programmer misuse;
// the factory New returns an error).
func NewTracker(level float64, o TrackerOptions) *Tracker {
	if err := checkLevel(level); err != nil {
		panic(err.Error())
	}
	o, err := o.resolve()
	if err != nil {
		panic(err.Error())
	}
	t := &Tracker{level: level, o: o, errs: newSortedRing(o.Window)}
	t.settle()
	return t
}

// Name returns "pid".
func (t *Tracker) Name() string { return MethodPID }

// Adjust returns the level tau and the offset p + r in MW.
func (t *Tracker) Adjust() (level, offset float64) { return t.level, t.off }

// Update feeds one settled outcome as described on Tracker. PIT is not
// used. An outcome whose Y or Issued is NaN carries no hit or miss and is
// ignored; one whose error Y - Issued is infinite counts as a hit or miss but
// stays out of the scale.
func (t *Tracker) Update(o Outcome) {
	if math.IsNaN(o.Y) || math.IsNaN(o.Issued) {
		return
	}
	err := 0.0
	if !o.Hit() {
		err = 1
	}
	if d := o.Y - o.Issued; !math.IsInf(d, 0) && !math.IsNaN(d) {
		t.errs.push(d)
	}
	t.scale = t.bound() // B_t, this outcome included
	eta := t.o.Eta
	if eta == 0 {
		eta = t.o.LR * t.scale
	}
	alpha := 1 - t.level
	w := o.weight()
	// Clamped to the finite doubles, p never becomes infinite, so the
	// offset p + r never meets Inf - Inf, however wild the outcomes.
	t.p = min(math.MaxFloat64, max(-math.MaxFloat64, t.p+eta*w*(err-alpha)))
	t.sum += w * (err - alpha)
	t.n++
	t.settle()
}

// settle recomputes the offset from p, S_t, t and B_t.
func (t *Tracker) settle() {
	t.scale = t.bound()
	t.off = t.p + t.integrator()
}

// bound returns B_t: the spread of the recent errors, at least MinScale and
// at most the largest double (two finite errors can be an infinite distance
// apart).
func (t *Tracker) bound() float64 {
	return min(math.MaxFloat64, max(t.o.MinScale, t.spread()))
}

// spread returns the distance between the 5% and 95% empirical quantiles of
// the recent errors (type 7), 0 when there are none.
func (t *Tracker) spread() float64 {
	return t.errs.quantile(scaleHi) - t.errs.quantile(1-scaleHi)
}

// integrator returns r_t = KI B_t tanh(S_t log(t+1) / (Csat (t+1))).
func (t *Tracker) integrator() float64 {
	if t.o.KI == 0 || t.n == 0 {
		return 0
	}
	// Grouped so that no step meets Inf/Inf or 0*Inf: log(n1)/n1 lies in
	// (0, 0.37] and sum/Csat is finite or infinite, never NaN.
	n1 := float64(t.n) + 1
	x := t.sum / t.o.Csat * (math.Log(n1) / n1)
	return t.o.KI * (t.scale * math.Tanh(x))
}

// Level returns the target level tau.
func (t *Tracker) Level() float64 { return t.level }

// Offset returns the offset the next Adjust will return, p + r, in MW.
func (t *Tracker) Offset() float64 { return t.off }

// Integrator returns r, the integrator's share of the offset, in MW.
func (t *Tracker) Integrator() float64 { return t.off - t.p }

// Scale returns B_t, the spread of the recent errors (at least MinScale).
func (t *Tracker) Scale() float64 { return t.scale }

// Options returns the options in use, defaults filled in (KI is 0 when the
// integrator is off).
func (t *Tracker) Options() TrackerOptions { return t.o }

// trackerHeaderLen is the length of a version-1 Tracker state before its
// errors: the version byte, eight doubles (level, LR, Eta, KI, Csat,
// MinScale, p, S_t), t (uint64), the window and the number of errors (uint32
// each).
const trackerHeaderLen = 1 + 8*8 + 8 + 4 + 4

// MarshalBinary encodes the tracker's state: a version byte (1); the level,
// LR, Eta, KI, Csat, MinScale, p and S_t as little-endian IEEE 754 doubles;
// t as a little-endian uint64; the window and the number of errors kept as
// little-endian uint32; the errors from the oldest (doubles).
func (t *Tracker) MarshalBinary() ([]byte, error) {
	n := t.errs.len()
	b := make([]byte, 0, trackerHeaderLen+8*n)
	b = append(b, stateVersion)
	for _, v := range []float64{t.level, t.o.LR, t.o.Eta, t.o.KI, t.o.Csat, t.o.MinScale, t.p, t.sum} {
		b = appendFloat(b, v)
	}
	b = appendUint64(b, t.n)
	b = appendUint32(b, uint32(t.errs.cap()))
	b = appendUint32(b, uint32(n))
	for i := range n {
		b = appendFloat(b, t.errs.at(i))
	}
	return b, nil
}

// UnmarshalBinary replaces the tracker's state with one written by
// MarshalBinary; the restored tracker behaves exactly as the one saved. It
// refuses an unknown version, a wrong length and values no Tracker can hold,
// with an error wrapping ErrState, and leaves t unchanged then.
func (t *Tracker) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("pid", data, 0)
	if err != nil {
		return err
	}
	if len(data) < trackerHeaderLen {
		return fmt.Errorf("%w: pid: %d bytes, want at least %d", ErrState, len(data), trackerHeaderLen)
	}
	level := r.float()
	o := TrackerOptions{LR: r.float(), Eta: r.float(), KI: r.float(), Csat: r.float(), MinScale: r.float()}
	p, sum, n := r.float(), r.float(), r.uint64()
	o.Window = int(r.uint32())
	count := int(r.uint32())
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: pid: level %v is outside (0, 1)", ErrState, level)
	}
	// A stored KI of 0 is an integrator turned off, which resolve would
	// read as the default; no state holds a negative KI.
	if o.LR == 0 || o.Csat == 0 || o.MinScale == 0 || o.Window == 0 {
		return fmt.Errorf("%w: pid: lr %v, csat %v, min scale %v and window %d must not be zero",
			ErrState, o.LR, o.Csat, o.MinScale, o.Window)
	}
	if math.Signbit(o.KI) {
		return fmt.Errorf("%w: pid: ki %v is negative", ErrState, o.KI)
	}
	if o.KI == 0 {
		o.KI = -1
	}
	ro, err := o.resolve()
	if err != nil {
		return fmt.Errorf("%w: %s", ErrState, strings.TrimPrefix(err.Error(), "conformal: "))
	}
	if count > ro.Window {
		return fmt.Errorf("%w: pid: %d errors in a window of %d", ErrState, count, ro.Window)
	}
	if r.left() != 8*count {
		return fmt.Errorf("%w: pid: %d bytes, want %d for %d errors", ErrState, len(data), trackerHeaderLen+8*count, count)
	}
	if math.IsNaN(p) || math.IsInf(p, 0) {
		return fmt.Errorf("%w: pid: p %v is not finite", ErrState, p)
	}
	// Each outcome moves S_t by w (err - alpha), in (-MaxWeight, MaxWeight).
	if !(math.Abs(sum) <= MaxWeight*float64(n)) {
		return fmt.Errorf("%w: pid: accumulated error %v after %d outcomes", ErrState, sum, n)
	}
	errs := newSortedRing(ro.Window)
	for range count {
		v := r.float()
		if math.IsNaN(v) || math.IsInf(v, 0) || (v == 0 && math.Signbit(v)) {
			return fmt.Errorf("%w: pid: error %v is not finite or is -0", ErrState, v)
		}
		errs.push(v)
	}
	*t = Tracker{level: level, o: ro, errs: errs, p: p, sum: sum, n: n}
	t.settle()
	return nil
}

// Correction returns what Adjust would return now, without its side
// effects (see Corrector).
func (t *Tracker) Correction() (level, offset float64) { return t.level, t.off }
