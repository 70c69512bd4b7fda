package score_test

import (
	"fmt"

	"github.com/plumb-forecast/plumb/model/score"
)

// The 0.9 quantile forecast of a site's output was 40 MW. An outcome of
// 50 MW, above it, costs 0.9 per MW short; one of 30 MW costs 0.1 per MW.
func ExamplePinball() {
	fmt.Printf("%.1f\n", score.Pinball(40, 50, 0.9))
	fmt.Printf("%.1f\n", score.Pinball(40, 30, 0.9))
	fmt.Printf("%.1f\n", score.Pinball(40, 40, 0.9))
	// Output:
	// 9.0
	// 1.0
	// 0.0
}

// A 90 % prediction interval [0, 10] MW (alpha = 0.1), METHODS.md section 5:
// inside, the score is the width; outside, each MW of the miss costs 2/alpha.
func ExampleIntervalScore() {
	for _, y := range []float64{5, 12, -1} {
		fmt.Printf("y = %v: %.0f\n", y, score.IntervalScore(0, 10, y, 0.1))
	}
	// Output:
	// y = 5: 10
	// y = 12: 50
	// y = -1: 30
}
