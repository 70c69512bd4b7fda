package forest_test

import (
	"fmt"

	"github.com/plumb-forecast/plumb/model/forest"
)

// A forest learns power per unit of capacity from one weather feature, an
// invented site's forecast irradiance in kW/m^2: output follows irradiance,
// and its spread grows with it (uniform within +-10 % of the irradiance).
// The true medians are 0.16 and 0.64, the true 80 % intervals [0.144, 0.176]
// and [0.576, 0.704]. The quantiles come back in the order of the levels,
// which need not be sorted.
func ExampleForest_Quantiles() {
	const n = 2000
	X := make([]float64, n)
	y := make([]float64, n)
	for i := range X {
		irr := float64(i%100) / 100         // 0 .. 0.99
		noise := float64(i*7919%41-20) / 20 // -1 .. 1, spread evenly
		X[i] = irr
		y[i] = 0.8*irr + float64(0.1*irr*noise)
	}
	f, err := forest.Fit(X, 1, y, forest.Options{Seed: 1})
	if err != nil {
		fmt.Println(err)
		return
	}
	levels := []float64{0.5, 0.1, 0.9}
	q := make([]float64, len(levels))
	var s forest.Scratch // reused across calls
	for _, irr := range []float64{0.2, 0.8} {
		f.Quantiles(q, []float64{irr}, levels, &s)
		fmt.Printf("irradiance %.1f: median %.3f, 80%% interval [%.3f, %.3f]\n", irr, q[0], q[1], q[2])
	}
	// Output:
	// irradiance 0.2: median 0.159, 80% interval [0.143, 0.177]
	// irradiance 0.8: median 0.644, 80% interval [0.580, 0.704]
}
