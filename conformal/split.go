package conformal

import (
	"fmt"
	"math"
	"sort"
)

// DefaultSplitWindow is the number of recent conformity scores a Split
// calibrator keeps when SplitOptions.Window is zero.
const DefaultSplitWindow = 500

// MaxWindow is the longest window of scores a Split or Tracker keeps.
const MaxWindow = 1 << 20

// SplitOptions configures a Split calibrator. The zero value is the default.
type SplitOptions struct {
	// Window is the number of most recent conformity scores the threshold
	// is taken from. Zero means DefaultSplitWindow (500); it must not be
	// negative nor exceed MaxWindow. A window too short for the level (see
	// SplitRank) gives the honest infinite offset for ever.
	Window int
}

// resolve fills in the default and checks the options.
func (o SplitOptions) resolve() (SplitOptions, error) {
	if o.Window == 0 {
		o.Window = DefaultSplitWindow
	}
	if o.Window < 1 || o.Window > MaxWindow {
		return o, fmt.Errorf("conformal: split window %d is outside [1, %d]", o.Window, MaxWindow)
	}
	return o, nil
}

// SplitRank returns the rank k (1 for the smallest) of the order statistic
// of n conformity scores that split conformal prediction takes as its
// threshold for miss rate alpha: k = ceil((n + 1)(1 - alpha)) (Romano,
// Patterson and Candes, NeurIPS 2019; METHODS.md section 4). A k above n
// means that n scores are too few and the honest threshold is infinite.
//
// (n + 1)(1 - alpha) is rounded down to an integer when it lies within a
// relative 1e-12 of one, so that a decimal level such as 0.9, inexact in
// binary, does not push k one rank up. It panics unless n >= 0 and alpha
// lies in (0, 1).
func SplitRank(n int, alpha float64) int {
	if n < 0 || !(alpha > 0 && alpha < 1) {
		panic(fmt.Sprintf("conformal: SplitRank(%d, %v) needs n >= 0 and alpha in (0, 1)", n, alpha))
	}
	x := float64(n+1) * (1 - alpha)
	k := math.Ceil(x)
	if k-x > 1-1e-12*x { // x is an integer but for rounding
		k--
	}
	return int(k)
}

// Split is split conformal prediction, in its conformalized quantile
// regression form (Romano, Patterson and Candes, NeurIPS 2019; METHODS.md
// section 4), on a rolling window of the last n outcomes: the static
// reference among the calibrators, valid when the recent scores and the next
// one are exchangeable and slow to follow a change otherwise.
//
// The conformity score of an outcome is s = Y - q, where q is the
// forecaster's raw quantile at the level tau. The calibrator does not see q:
// it takes q = Issued - offset, the value issued for the level minus the
// offset this calibrator returned from its last Adjust. When the issued value
// was moved by the sorting or clipping of the bundle, or the offset changed
// between the forecast and the last Adjust (delayed feedback: outcomes settle
// h after the forecast), the score is taken on that value all the same. A
// score that is not finite is dropped.
//
// For a level tau >= 0.5 (an upper bound, miss rate alpha = 1 - tau) the
// offset is the k-th smallest of the n scores in the window with
// k = SplitRank(n, 1 - tau): under exchangeability Y <= q + offset with
// probability k / (n + 1) >= tau. For tau < 0.5 (the lower tail) the rule is
// the mirror image, as for the lower quantile of a conformalized interval:
// the score of the lower side is q - Y, its threshold at miss rate tau is the
// k-th smallest of those with k = SplitRank(n, tau), and the offset is the
// (n + 1 - k)-th smallest of the scores Y - q, so that Y <= q + offset with
// probability (n + 1 - k) / (n + 1) <= tau: the issued quantile errs on the
// side that widens the central interval.
//
// When k > n the honest offset is infinite: +Inf for tau >= 0.5, -Inf
// below, which the site actor clips to the available capacity or to zero.
// Split returns it when the window itself is too short for the level (for
// tau = 0.9 a window under 9 scores, METHODS.md section 4). While a long
// enough window is still filling it returns a zero offset instead, the
// forecaster's own quantile: an infinite offset leaves no raw quantile to
// score, so the window would never fill.
//
// The zero Split is not usable: build one with NewSplit or restore one with
// UnmarshalBinary. A Split is not safe for concurrent use.
type Split struct {
	level  float64
	tail   float64 // the miss rate of the bound: min(tau, 1 - tau)
	upper  bool    // tau >= 0.5
	scores sortedRing
	used   float64 // the offset the last Adjust returned
	offset float64 // the offset the next Adjust returns
}

// NewSplit returns a split-conformal calibrator for the level tau = level in
// (0, 1). It panics on a level outside (0, 1) or invalid options (programmer
// misuse; the factory New returns an error).
func NewSplit(level float64, o SplitOptions) *Split {
	if err := checkLevel(level); err != nil {
		panic(err.Error())
	}
	o, err := o.resolve()
	if err != nil {
		panic(err.Error())
	}
	s := &Split{scores: newSortedRing(o.Window)}
	s.setLevel(level)
	s.offset = s.threshold()
	s.used = s.offset
	return s
}

func (s *Split) setLevel(level float64) {
	s.level = level
	s.upper = level >= 0.5
	s.tail = 1 - level
	if !s.upper {
		s.tail = level
	}
}

// threshold returns the offset the current window gives.
func (s *Split) threshold() float64 {
	n, w := s.scores.len(), s.scores.cap()
	k := SplitRank(n, s.tail)
	if k > n {
		if SplitRank(w, s.tail) <= w {
			return 0 // filling up: issue the raw quantile and learn its score
		}
		if s.upper {
			return math.Inf(1)
		}
		return math.Inf(-1)
	}
	if s.upper {
		return s.scores.kth(k)
	}
	return s.scores.kth(n + 1 - k)
}

// Name returns "split".
func (s *Split) Name() string { return MethodSplit }

// Adjust returns the level tau and the offset from the window's scores
// (+Inf or -Inf when the window is too short for the level, zero while it
// fills). It records the offset, which Update takes off the issued value to
// find the raw quantile.
func (s *Split) Adjust() (level, offset float64) {
	s.used = s.offset
	return s.level, s.offset
}

// Update feeds one settled outcome: the score Y - (Issued - offset) enters
// the window, dropping the oldest when full. PIT and Weight are not used
// (the static reference weighs every kept outcome alike). An outcome
// whose Y or Issued is NaN, or whose score is not finite, is ignored.
func (s *Split) Update(o Outcome) {
	if math.IsNaN(o.Y) || math.IsNaN(o.Issued) {
		return
	}
	sc := o.Y - (o.Issued - s.used)
	if math.IsNaN(sc) || math.IsInf(sc, 0) {
		return
	}
	s.scores.push(sc)
	s.offset = s.threshold()
}

// Level returns the target level tau.
func (s *Split) Level() float64 { return s.level }

// Offset returns the offset the next Adjust will return.
func (s *Split) Offset() float64 { return s.offset }

// Len returns the number of scores in the window.
func (s *Split) Len() int { return s.scores.len() }

// Window returns the window's capacity.
func (s *Split) Window() int { return s.scores.cap() }

// splitHeaderLen is the length of a version-1 Split state before its
// scores: the version byte, the level, the window (uint32), the offset of
// the last Adjust and the number of scores (uint32).
const splitHeaderLen = 1 + 8 + 4 + 8 + 4

// MarshalBinary encodes the calibrator's state: a version byte (1), the
// level (little-endian IEEE 754 double), the window (little-endian uint32),
// the offset returned by the last Adjust (double), the number of scores
// (uint32) and the scores from the oldest (doubles).
func (s *Split) MarshalBinary() ([]byte, error) {
	n := s.scores.len()
	b := make([]byte, 0, splitHeaderLen+8*n)
	b = append(b, stateVersion)
	b = appendFloat(b, s.level)
	b = appendUint32(b, uint32(s.scores.cap()))
	b = appendFloat(b, s.used)
	b = appendUint32(b, uint32(n))
	for i := range n {
		b = appendFloat(b, s.scores.at(i))
	}
	return b, nil
}

// UnmarshalBinary replaces the calibrator's state with one written by
// MarshalBinary; the restored calibrator behaves exactly as the one saved.
// It refuses an unknown version, a wrong length and values no Split can
// hold, with an error wrapping ErrState, and leaves s unchanged then.
func (s *Split) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("split", data, 0)
	if err != nil {
		return err
	}
	if len(data) < splitHeaderLen {
		return fmt.Errorf("%w: split: %d bytes, want at least %d", ErrState, len(data), splitHeaderLen)
	}
	level, window, used, n := r.float(), int(r.uint32()), r.float(), int(r.uint32())
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: split: level %v is outside (0, 1)", ErrState, level)
	}
	if window < 1 || window > MaxWindow {
		return fmt.Errorf("%w: split: window %d is outside [1, %d]", ErrState, window, MaxWindow)
	}
	if n > window {
		return fmt.Errorf("%w: split: %d scores in a window of %d", ErrState, n, window)
	}
	if r.left() != 8*n {
		return fmt.Errorf("%w: split: %d bytes, want %d for %d scores", ErrState, len(data), splitHeaderLen+8*n, n)
	}
	if math.IsNaN(used) {
		return fmt.Errorf("%w: split: offset is NaN", ErrState)
	}
	scores := newSortedRing(window)
	for range n {
		v := r.float()
		if math.IsNaN(v) || math.IsInf(v, 0) || (v == 0 && math.Signbit(v)) {
			return fmt.Errorf("%w: split: score %v is not finite or is -0", ErrState, v)
		}
		scores.push(v)
	}
	s.setLevel(level)
	s.scores, s.used = scores, used
	s.offset = s.threshold()
	return nil
}

// sortedRing is a bounded window of the last values pushed, kept both in
// arrival order (a ring) and sorted, so that an order statistic costs O(1)
// and a push O(n) (binary searches and a copy). It does not allocate after
// construction. Values must not be NaN; -0 is stored as +0, so that which of
// two equal zeros leaves the window does not matter.
type sortedRing struct {
	ring   []float64 // arrival order; the oldest is ring[head]
	head   int
	sorted []float64 // the same values, increasing; its length is the count
}

func newSortedRing(n int) sortedRing {
	return sortedRing{ring: make([]float64, n), sorted: make([]float64, 0, n)}
}

func (r *sortedRing) len() int { return len(r.sorted) }
func (r *sortedRing) cap() int { return len(r.ring) }

// push adds v, dropping the oldest value first when the window is full.
func (r *sortedRing) push(v float64) {
	v += 0 // -0 + 0 is +0
	n := len(r.sorted)
	if n == len(r.ring) {
		old := r.ring[r.head]
		i := sort.SearchFloat64s(r.sorted, old)
		copy(r.sorted[i:], r.sorted[i+1:])
		r.sorted = r.sorted[:n-1]
		r.ring[r.head] = v
		r.head++
		if r.head == len(r.ring) {
			r.head = 0
		}
	} else {
		r.ring[(r.head+n)%len(r.ring)] = v
	}
	j := sort.SearchFloat64s(r.sorted, v)
	r.sorted = append(r.sorted, 0) // within capacity
	copy(r.sorted[j+1:], r.sorted[j:])
	r.sorted[j] = v
}

// kth returns the k-th smallest value, 1 <= k <= len.
func (r *sortedRing) kth(k int) float64 { return r.sorted[k-1] }

// at returns the i-th oldest value, 0 <= i < len.
func (r *sortedRing) at(i int) float64 { return r.ring[(r.head+i)%len(r.ring)] }

// quantile returns the empirical quantile at level l in [0, 1] by linear
// interpolation between order statistics (type 7 of Hyndman and Fan, 1996,
// the default of R and NumPy); 0 when empty.
func (r *sortedRing) quantile(l float64) float64 {
	x := r.sorted
	if len(x) == 0 {
		return 0
	}
	h := l * float64(len(x)-1)
	i := int(h)
	if i >= len(x)-1 {
		return x[len(x)-1]
	}
	return x[i] + (h-float64(i))*(x[i+1]-x[i])
}

// Correction returns what Adjust would return now, without its side
// effects (see Corrector).
func (s *Split) Correction() (level, offset float64) { return s.level, s.offset }
