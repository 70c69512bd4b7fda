package forest

import "testing"

// BenchmarkFit grows the default forest (100 trees) on n = 15000 rows of
// p = 16 features on one goroutine: the size of a site's history of
// hourly weather rows. forest-MB is the size of the grown forest.
func BenchmarkFit(b *testing.B) {
	X, y := hetero(15000, 16, 1)
	b.ReportAllocs()
	var f *Forest
	for b.Loop() {
		var err error
		if f, err = Fit(X, 16, y, Options{Seed: 1}); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(f.Bytes())/1e6, "forest-MB")
}

// BenchmarkQuantiles99 asks the forest of BenchmarkFit for the 99 levels
// 0.01..0.99 at one feature row, with a warmed Scratch.
func BenchmarkQuantiles99(b *testing.B) {
	X, y := hetero(15000, 16, 1)
	f, err := Fit(X, 16, y, Options{Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	Xq, _ := hetero(256, 16, 2)
	levels := grid(100)
	dst := make([]float64, len(levels))
	var s Scratch
	for i := 0; i < 256; i++ {
		f.Quantiles(dst, Xq[i*16:(i+1)*16], levels, &s)
	}
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		f.Quantiles(dst, Xq[i*16:(i+1)*16], levels, &s)
		i = (i + 1) % 256
	}
}
