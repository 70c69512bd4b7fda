package conformal

import "fmt"

// None is the identity calibrator: it issues the forecaster's own quantile
// at the target level and learns nothing. It is the baseline that shows what
// calibration adds, and the choice when the forecaster is trusted as it is.
//
// The zero None is not usable: build one with NewNone or restore one with
// UnmarshalBinary.
type None struct {
	level float64
}

// NewNone returns the identity calibrator of a level in (0, 1); it panics on
// a level outside (0, 1).
func NewNone(level float64) *None {
	if err := checkLevel(level); err != nil {
		panic(err.Error())
	}
	return &None{level: level}
}

// Name returns "none".
func (n *None) Name() string { return MethodNone }

// Adjust returns the target level and a zero offset.
func (n *None) Adjust() (level, offset float64) { return n.level, 0 }

// Update does nothing.
func (n *None) Update(Outcome) {}

// Level returns the target level.
func (n *None) Level() float64 { return n.level }

// noneStateLen is the length of a version-1 None state: the version byte and
// the level.
const noneStateLen = 1 + 8

// MarshalBinary encodes the calibrator: a version byte (1) and the level as a
// little-endian IEEE 754 double.
func (n *None) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, noneStateLen)
	b = append(b, stateVersion)
	return appendFloat(b, n.level), nil
}

// UnmarshalBinary restores a calibrator written by MarshalBinary. It refuses
// an unknown version, a wrong length or a level outside (0, 1) with an error
// wrapping ErrState, and leaves n unchanged then.
func (n *None) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("none", data, noneStateLen)
	if err != nil {
		return err
	}
	level := r.float()
	if checkLevel(level) != nil {
		return fmt.Errorf("%w: none: level %v is outside (0, 1)", ErrState, level)
	}
	n.level = level
	return nil
}

// Correction returns what Adjust would return now, without its side
// effects (see Corrector).
func (n *None) Correction() (level, offset float64) { return n.level, 0 }
