package model

import (
	"errors"
	"fmt"
	"strings"
)

// ErrUnknownModel is wrapped by New when no forecaster has the given name.
var ErrUnknownModel = errors.New("unknown model")

// constructor makes one named forecaster with its default options.
type constructor struct {
	name string
	make func(site Site, setup Setup) Forecaster
}

// constructors lists the forecasters New knows, sorted by name.
func constructors() []constructor {
	return []constructor{
		{"baseline", func(s Site, u Setup) Forecaster {
			return NewBaseline(s.Kind, BaselineOptions{Buckets: u.Buckets})
		}},
		{"climatology", func(Site, Setup) Forecaster {
			return NewClimatology(ClimatologyOptions{})
		}},
		{"persistence", func(_ Site, u Setup) Forecaster {
			return NewPersistence(PersistenceOptions{Buckets: u.Buckets})
		}},
		{"stack", func(s Site, u Setup) Forecaster {
			return NewStack(s, u, StackOptions{})
		}},
		{"stack-analog", func(s Site, u Setup) Forecaster {
			return NewStack(s, u, StackOptions{Learner: LearnerAnalog})
		}},
	}
}

// Names returns the names New accepts, sorted. The slice is the caller's.
func Names() []string {
	cs := constructors()
	out := make([]string, len(cs))
	for i, c := range cs {
		out[i] = c.name
	}
	return out
}

// New returns a new forecaster for site by name ("baseline", "climatology",
// "persistence": see Names), with its default options and the given lead
// buckets (the zero value means DefaultBuckets). The forecaster's Name is
// name. An unknown name gives an error wrapping ErrUnknownModel that lists
// the known names.
func New(name string, site Site, buckets Buckets) (Forecaster, error) {
	return Make(name, site, Setup{Buckets: buckets})
}

// Make is New with the whole Setup: forecasters that learn a grid of
// levels (Stack) learn the worker's levels.
func Make(name string, site Site, setup Setup) (Forecaster, error) {
	setup = setup.withDefaults()
	for _, c := range constructors() {
		if c.name == name {
			return c.make(site, setup), nil
		}
	}
	return nil, fmt.Errorf("model: %w %q (known: %s)", ErrUnknownModel, name, strings.Join(Names(), ", "))
}
