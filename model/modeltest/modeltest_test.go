package modeltest_test

import (
	"testing"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/modeltest"
)

func TestBaseline(t *testing.T) {
	modeltest.Run(t, func(s model.Site) model.Forecaster {
		return model.NewBaseline(s.Kind, model.BaselineOptions{})
	})
}

func TestClimatology(t *testing.T) {
	modeltest.Run(t, func(model.Site) model.Forecaster {
		return model.NewClimatology(model.ClimatologyOptions{})
	})
}

func TestPersistence(t *testing.T) {
	modeltest.Run(t, func(model.Site) model.Forecaster {
		return model.NewPersistence(model.PersistenceOptions{})
	})
}

func TestStack(t *testing.T) {
	modeltest.Run(t, func(s model.Site) model.Forecaster {
		return model.NewStack(s, model.Setup{}, model.StackOptions{})
	})
}
