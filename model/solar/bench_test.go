package solar

import (
	"math"
	"testing"
	"time"
)

var sink float64

func BenchmarkIncidence(b *testing.B) {
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		sink += Incidence(50.11162, float64(i%360), 30, 170)
	}
}

func BenchmarkPVPotential(b *testing.B) {
	b.ReportAllocs()
	at := time.Date(2023, 6, 10, 11, 0, 0, 0, time.UTC)
	for i := 0; b.Loop(); i++ {
		sink += PVPotential(at.Add(time.Duration(i%96)*15*time.Minute), 46, 8, 650, 21, 3, 30, 180)
	}
}

func BenchmarkPVPotentialHorizontal(b *testing.B) {
	b.ReportAllocs()
	at := time.Date(2023, 6, 10, 11, 0, 0, 0, time.UTC)
	for b.Loop() {
		sink += PVPotential(at, 46, 8, 650, 21, math.NaN(), math.NaN(), math.NaN())
	}
}

// TestHotPathsDoNotAllocate holds the per-interval functions to zero
// allocations.
func TestHotPathsDoNotAllocate(t *testing.T) {
	at := time.Date(2023, 6, 10, 11, 0, 0, 0, time.UTC)
	if n := testing.AllocsPerRun(100, func() { sink += PVPotential(at, 46, 8, 650, 21, 3, 30, 180) }); n != 0 {
		t.Errorf("PVPotential allocates %v times per call", n)
	}
	if n := testing.AllocsPerRun(100, func() { sink += Incidence(50, 194, 30, 170) }); n != 0 {
		t.Errorf("Incidence allocates %v times per call", n)
	}
}
