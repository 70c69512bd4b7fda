package conformal

import (
	"errors"
	"fmt"
	"strings"
)

// Method names accepted by New.
const (
	MethodACI   = "aci"
	MethodNone  = "none"
	MethodPID   = "pid"
	MethodDtACI = "dtaci"
	MethodSplit = "split"
)

// ErrUnknownMethod is wrapped by the error New returns for a method name it
// does not know.
var ErrUnknownMethod = errors.New("conformal: unknown calibration method")

// Options chooses and configures a calibrator. The zero value is ACI with its
// default step size; each method reads only its own fields, whose zero
// values are its defaults. Options are comparable with ==.
type Options struct {
	// Method is one of Methods(): "aci" (ACI), "none" (None), "pid"
	// (Tracker), "dtaci" (DtACI) or "split" (Split). Empty means "aci".
	// Case and surrounding spaces are ignored.
	Method string
	// Gamma is the ACI step size; zero means DefaultGamma. Read by "aci"
	// only.
	Gamma float64
	// Tracker configures "pid": step size, integrator and the window of
	// its scale. Zero means a scale-free step of 0.003 times the spread of
	// the last 500 errors, with the integrator on.
	Tracker TrackerOptions
	// DtACI configures "dtaci": the experts' step sizes and the weights'
	// sigma and eta. Zero means eight experts stepping 0.001, 0.002, ...,
	// 0.128 and the authors' sigma = 1/1000, eta = 2.72.
	DtACI DtACIOptions
	// Split configures "split": the window of scores. Zero means 500.
	Split SplitOptions
}

// Methods returns the known method names, in a new slice the caller owns.
func Methods() []string {
	return []string{MethodACI, MethodNone, MethodPID, MethodDtACI, MethodSplit}
}

// New returns a calibrator of the chosen method for a level in (0, 1). It
// returns an error for a level outside (0, 1), invalid options of the
// chosen method, or an unknown method (wrapping ErrUnknownMethod and
// listing the known ones).
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
	case MethodPID:
		if _, err := o.Tracker.resolve(); err != nil {
			return nil, err
		}
		return NewTracker(level, o.Tracker), nil
	case MethodDtACI:
		if _, err := o.DtACI.resolve(); err != nil {
			return nil, err
		}
		return NewDtACI(level, o.DtACI), nil
	case MethodSplit:
		if _, err := o.Split.resolve(); err != nil {
			return nil, err
		}
		return NewSplit(level, o.Split), nil
	default:
		return nil, fmt.Errorf("%w %q (known methods: %s)",
			ErrUnknownMethod, o.Method, strings.Join(Methods(), ", "))
	}
}
