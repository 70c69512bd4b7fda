package conformal

import (
	"errors"
	"fmt"
	"strings"
)

// Method names accepted by New.
const (
	MethodACI  = "aci"
	MethodNone = "none"
)

// ErrUnknownMethod is wrapped by the error New returns for a method name it
// does not know.
var ErrUnknownMethod = errors.New("conformal: unknown calibration method")

// Options chooses and configures a calibrator. The zero value is ACI with its
// default step size.
type Options struct {
	// Method is one of Methods(): "aci" or "none". Empty means "aci". Case
	// and surrounding spaces are ignored.
	Method string
	// Gamma is the ACI step size; zero means DefaultGamma. Ignored by "none".
	Gamma float64
}

// Methods returns the known method names, in a new slice the caller owns.
func Methods() []string { return []string{MethodACI, MethodNone} }

// New returns a calibrator of the chosen method for a level in (0, 1). It
// returns an error for a level outside (0, 1), a bad step size, or an
// unknown method (wrapping ErrUnknownMethod and listing the known ones).
func New(level float64, o Options) (Calibrator, error) {
	if err := checkLevel(level); err != nil {
		return nil, err
	}
	switch m := strings.ToLower(strings.TrimSpace(o.Method)); m {
	case "", MethodACI:
		gamma, err := aciGamma(o.Gamma)
		if err != nil {
			return nil, err
		}
		return NewACI(level, ACIOptions{Gamma: gamma}), nil
	case MethodNone:
		return NewNone(level), nil
	default:
		return nil, fmt.Errorf("%w %q (known methods: %s)",
			ErrUnknownMethod, o.Method, strings.Join(Methods(), ", "))
	}
}
