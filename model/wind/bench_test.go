package wind

import (
	"math/rand/v2"
	"testing"
)

var sink float64

func BenchmarkCurveAdd(b *testing.B) {
	b.ReportAllocs()
	c := NewCurve(CurveOptions{})
	rng := rand.New(rand.NewPCG(1, 2))
	speeds := make([]float64, 1024)
	for i := range speeds {
		speeds[i] = weibull(rng)
	}
	for i := 0; b.Loop(); i++ {
		v := speeds[i%len(speeds)]
		c.Add(v, logistic(v))
	}
}

// BenchmarkCurveEval evaluates a fitted curve (no refit).
func BenchmarkCurveEval(b *testing.B) {
	b.ReportAllocs()
	c := trained(b, CurveOptions{}, 1)
	c.Eval(0)
	for i := 0; b.Loop(); i++ {
		sink += c.Eval(float64(i%2500) * 0.01)
	}
}

// BenchmarkCurveAddEval alternates Add and Eval, so every Eval refits (the
// worst case, O(bins)).
func BenchmarkCurveAddEval(b *testing.B) {
	b.ReportAllocs()
	c := trained(b, CurveOptions{}, 1)
	for i := 0; b.Loop(); i++ {
		v := float64(i%2500) * 0.01
		c.Add(v, logistic(v))
		sink += c.Eval(v)
	}
}

func BenchmarkHubSpeed(b *testing.B) {
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		sink += NormalizeSpeed(HubSpeed(float64(i%25), 10, 100, DefaultShear), AirDensity(1000, 12))
	}
}
