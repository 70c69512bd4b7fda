package conformal

import "time"

// TieHit reports whether outcome y counts as at or below the quantile q[j]
// of a sorted set of quantiles q at the given levels. An outcome equal to
// several quantiles sits on a point mass of the forecast (quantiles clipped
// to zero at night or calm, or to the capacity): its PIT is then uniform
// between the levels around the tie, and u in [0, 1) draws it. This is the
// randomised PIT for distributions with atoms (Czado, Gneiting and Held,
// Biometrics 65, 2009): a calibrated forecast then covers each level at its
// rate, where counting every tie as a hit would overstate coverage.
func TieHit(levels, q []float64, j int, y, u float64) bool {
	if y != q[j] {
		return y < q[j]
	}
	ja, jb := j, j
	for ja > 0 && q[ja-1] == y {
		ja--
	}
	for jb+1 < len(q) && q[jb+1] == y {
		jb++
	}
	if ja == jb && ja > 0 && jb < len(q)-1 {
		return true // one quantile equal to y, no atom: y <= q
	}
	lo, hi := 0.0, 1.0
	if ja > 0 {
		lo = levels[ja-1]
	}
	if jb < len(q)-1 {
		hi = levels[jb]
	}
	return lo+u*(hi-lo) <= levels[j]
}

// TieDraw returns a number in [0, 1) fixed by a seed (e.g. a hash of the
// site id), an interval and a small integer (e.g. a lead bucket): the draw
// of TieHit, the same on every replay.
func TieDraw(seed uint64, interval time.Time, k int) float64 {
	x := seed ^ uint64(interval.Unix())*0x9E3779B97F4A7C15 ^ uint64(k+1)*0xBF58476D1CE4E5B9
	// splitmix64 finaliser (Steele, Lea and Flood, 2014)
	x ^= x >> 30
	x *= 0xBF58476D1CE4E5B9
	x ^= x >> 27
	x *= 0x94D049BB133111EB
	x ^= x >> 31
	return float64(x>>11) / (1 << 53)
}
