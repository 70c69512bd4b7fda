package forest

import (
	"math/rand/v2"
)

// hetero draws n rows of the heteroscedastic model
//
//	y = x1 + (0.1 + x2) e,  e ~ N(0, 1),
//
// with x1 uniform on [0, 3], x2 uniform on [0, 1] and p-2 further features,
// uniform on [0, 1], that y does not depend on. Its conditional quantile at
// level tau is x1 + (0.1 + x2) Phi^-1(tau) (see heteroQuantile).
func hetero(n, p int, seed uint64) (X, y []float64) {
	rng := rand.New(rand.NewPCG(seed, 0x5eed))
	X = make([]float64, n*p)
	y = make([]float64, n)
	for i := range y {
		row := X[i*p : (i+1)*p]
		for j := range row {
			row[j] = rng.Float64()
		}
		row[0] *= 3
		y[i] = row[0] + (0.1+row[1])*rng.NormFloat64()
	}
	return X, y
}

// grid returns the levels 1/k, ..., (k-1)/k.
func grid(k int) []float64 {
	out := make([]float64, k-1)
	for i := range out {
		out[i] = float64(i+1) / float64(k)
	}
	return out
}
