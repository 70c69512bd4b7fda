package qr_test

import (
	"fmt"
	"math/rand/v2"

	"github.com/plumb-forecast/plumb/model/qr"
)

// The median line through five invented points. An exact fit passes
// through two of them, here the first and the last: (1, 1.0), (5, 5.1).
func ExampleFit() {
	x := []float64{1, 2, 3, 4, 5}
	y := []float64{1.0, 2.5, 2.9, 4.2, 5.1}
	X := make([]float64, 0, 2*len(x))
	for _, v := range x {
		X = append(X, 1, v) // intercept column, then the regressor
	}
	beta, loss, err := qr.Fit(X, 2, y, 0.5)
	if err != nil {
		panic(err)
	}
	fmt.Printf("intercept %.4f slope %.4f summed pinball loss %.4f\n", beta[0], beta[1], loss)
	// Output:
	// intercept -0.0250 slope 1.0250 summed pinball loss 0.3750
}

// One learner of the 0.9 quantile of an invented site's output (MW) given
// a driver, updated as each outcome settles.
func ExampleOnline() {
	rng := rand.New(rand.NewPCG(1, 2))
	m := qr.NewOnline(2, 0.9, qr.OnlineOptions{})
	x := make([]float64, 2)
	below, n := 0, 0
	for i := 0; i < 20000; i++ {
		driver := 30 * rng.Float64()
		x[0], x[1] = 1, driver
		y := 0.6*driver + 1.5*rng.NormFloat64()
		if i >= 10000 {
			n++
			if y <= m.Predict(x) {
				below++
			}
		}
		m.Update(x, y)
	}
	fmt.Printf("share of outcomes at or below the forecast: %.2f\n", float64(below)/float64(n))
	// Output:
	// share of outcomes at or below the forecast: 0.90
}
