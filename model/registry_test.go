package model

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
)

func TestNames(t *testing.T) {
	got := Names()
	want := []string{"baseline", "climatology", "persistence", "stack", "stack-analog"}
	if !slices.Equal(got, want) {
		t.Fatalf("Names() = %v, want %v", got, want)
	}
	got[0] = "changed"
	if Names()[0] != "baseline" {
		t.Fatal("Names returns a shared slice")
	}
}

func TestNew(t *testing.T) {
	site := Site{ID: "wind-test-knoll", Kind: KindWind, CapacityMW: 12}
	for _, name := range Names() {
		t.Run(name, func(t *testing.T) {
			f, err := New(name, site, Buckets{})
			if err != nil {
				t.Fatalf("New(%q): %v", name, err)
			}
			if f.Name() != name {
				t.Fatalf("New(%q).Name() = %q", name, f.Name())
			}
			// A fresh forecaster answers: uniform over [0, 12 MW].
			x := Features{CapacityMW: 12, Availability: 1, Driver: math.NaN(), RunAgeMinutes: math.NaN(), LastPowerMW: math.NaN()}
			dst := make([]float64, 1)
			f.Quantiles(dst, &x, []float64{0.5})
			if dst[0] != 6 {
				t.Fatalf("fresh %s: median %v, want 6", name, dst[0])
			}
		})
	}
}

func TestNewUnknown(t *testing.T) {
	for _, name := range []string{"", "Baseline", "climatology ", "quantile-forest"} {
		t.Run(name, func(t *testing.T) {
			f, err := New(name, Site{ID: "pv-test-fen", Kind: KindPV, CapacityMW: 3}, DefaultBuckets())
			if f != nil || !errors.Is(err, ErrUnknownModel) {
				t.Fatalf("New(%q) = %v, %v; want nil and ErrUnknownModel", name, f, err)
			}
			for _, known := range Names() {
				if !strings.Contains(err.Error(), known) {
					t.Errorf("error %q does not list %q", err, known)
				}
			}
		})
	}
}

// TestNewBuckets checks that New hands the buckets to the forecaster: with
// two buckets, Features.Bucket 5 is clamped into bucket 1 and shares its
// errors; with the default eight it is a bucket of its own.
func TestNewBuckets(t *testing.T) {
	site := Site{ID: "wind-test-knoll", Kind: KindWind, CapacityMW: 12}
	feed := func(f Forecaster) float64 {
		for i := 0; i < 40; i++ {
			t0 := at(i, 0, 0)
			f.Learn(5, []*Features{interval(t0, 60, 1, 4), interval(t0, 60, 5, 6)}) // errors +1 and -1
		}
		dst := make([]float64, 1)
		f.Quantiles(dst, interval(at(50, 0, 0), 60, 1, 0), []float64{0.25})
		return dst[0]
	}
	two, err := New("persistence", site, Buckets{Edges: []int{0, 60}})
	if err != nil {
		t.Fatal(err)
	}
	eight, err := New("persistence", site, Buckets{})
	if err != nil {
		t.Fatal(err)
	}
	// Two buckets: bucket 1 holds 40 errors of -1 and 40 of +1; its 0.25
	// quantile (type 7, h = 0.25 x 79 = 19.75, between the 20th and 21st
	// of the sorted errors, both -1) is -1. Eight: only +1 errors.
	if got := feed(two); got != -1 {
		t.Errorf("two buckets: %v, want -1", got)
	}
	if got := feed(eight); got != 1 {
		t.Errorf("eight buckets: %v, want 1", got)
	}
}
