package conformal

import (
	"fmt"
	"math"
	"testing"
)

// TestHotPathsDoNotAllocate holds the per-outcome paths to zero allocations.
func TestHotPathsDoNotAllocate(t *testing.T) {
	a := NewACI(0.9, ACIOptions{})
	w := NewWindow(672)
	m, err := NewMonitor(0.9, MonitorOptions{})
	if err != nil {
		t.Fatal(err)
	}
	i := 0
	cases := []struct {
		name string
		fn   func()
	}{
		{"ACI Update+Adjust", func() {
			l, off := a.Adjust()
			a.Update(Outcome{Y: float64(i%10) / 10, Issued: l + off, PIT: math.NaN()})
			i++
		}},
		{"Window Add", func() { w.Add(i%7 != 0); i++ }},
		{"Window Transitions", func() { _ = w.Transitions() }},
		{"Monitor Observe+Check", func() {
			m.Observe(Outcome{Y: float64(i % 10), Issued: 8.5, PIT: 0.5})
			m.Check()
			i++
		}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if n := testing.AllocsPerRun(1000, c.fn); n != 0 {
				t.Errorf("%v allocations per run, want 0", n)
			}
		})
	}
}

func BenchmarkACIUpdateAdjust(b *testing.B) {
	a := NewACI(0.9, ACIOptions{})
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		l, off := a.Adjust()
		a.Update(Outcome{Y: float64(i%10) / 10, Issued: l + off, PIT: math.NaN()})
		i++
	}
}

func BenchmarkWindowAdd(b *testing.B) {
	for _, n := range []int{96, 672, 8064} {
		b.Run(fmt.Sprintf("N=%d", n), func(b *testing.B) {
			w := NewWindow(n)
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				w.Add(i%7 != 0)
				i++
			}
		})
	}
}

func BenchmarkMonitorObserveCheck(b *testing.B) {
	m, err := NewMonitor(0.9, MonitorOptions{})
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		m.Observe(Outcome{Y: float64(i % 10), Issued: 8.5, PIT: 0.5})
		m.Check()
		i++
	}
}
