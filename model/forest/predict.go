package forest

import "math/bits"

// Scratch is reusable working memory for Quantiles. The zero value is ready
// to use; it grows to the size a forest needs on first use and is then
// reused without allocation. A Scratch may serve several forests but only
// one call at a time: it is not safe for concurrent use.
type Scratch struct {
	keys, tmp []uint64   // (rank << 32 | tree) of every row in the reached leaves
	count     [256]int32 // radix sort buckets
	cur, act  []int32    // per tree: node reached (then leaf); trees still walking
	weight    []float64  // per tree: 1 / (rows in its reached leaf)
	cum       []float64  // cumulative weight along the sorted keys
}

// Quantiles writes to dst[k] the forest's conditional quantile of y at
// levels[k] for the feature row x: the smallest training response y with
// F(y | x) >= levels[k], F being the forest's weighted empirical
// distribution (see the package doc). A level less than 1e-9 above a jump
// of F counts as reached by it, so that rounding in the summed weights does
// not move a quantile to the next value. The result is non-decreasing in the
// level and always one of the training responses. Levels need not be
// sorted. x may hold NaN.
//
// s is working memory (nil allocates a fresh one per call). Quantiles panics
// if len(x) != f.Features(), len(dst) != len(levels) or a level is not in
// (0, 1).
func (f *Forest) Quantiles(dst, x, levels []float64, s *Scratch) {
	if len(x) != f.p {
		panic("forest: Quantiles: len(x) differs from Features()")
	}
	if len(dst) != len(levels) {
		panic("forest: Quantiles: len(dst) != len(levels)")
	}
	for _, l := range levels {
		if !(l > 0 && l < 1) {
			panic("forest: Quantiles: a level is outside (0, 1)")
		}
	}
	if s == nil {
		s = new(Scratch)
	}
	keys := f.gather(x, s)
	keys = s.sort(keys, f.n)

	if cap(s.cum) < len(keys) {
		s.cum = make([]float64, len(keys), 2*len(keys))
	}
	cum := s.cum[:len(keys)]
	var c float64
	for i, k := range keys {
		c += s.weight[uint32(k)]
		cum[i] = c
	}
	total := float64(f.trees)
	for i, l := range levels {
		target := (l - 1e-9) * total // one product: nothing for a compiler to fuse
		// First index with cum >= target.
		a, b := 0, len(cum)-1
		for a < b {
			h := int(uint(a+b) >> 1)
			if cum[h] >= target {
				b = h
			} else {
				a = h + 1
			}
		}
		dst[i] = f.sorted[keys[a]>>32]
	}
}

// gather collects the rows of the leaf that x reaches in every tree into
// s.keys, as rank << 32 | tree, and the trees' weights into s.weight.
func (f *Forest) gather(x []float64, s *Scratch) []uint64 {
	if cap(s.weight) < f.trees {
		s.weight = make([]float64, f.trees)
		s.cur = make([]int32, f.trees)
		s.act = make([]int32, f.trees)
	}
	s.weight = s.weight[:f.trees]
	// Walk all trees down together, one level per pass: the node loads of
	// different trees are independent, so their cache misses overlap.
	cur, act := s.cur[:f.trees], s.act[:f.trees]
	copy(cur, f.roots)
	for t := range act {
		act[t] = int32(t)
	}
	nodes := f.nodes
	hasNaN := false
	for _, v := range x {
		if v != v {
			hasNaN = true
		}
	}
	for len(act) > 0 {
		k := 0
		if !hasNaN {
			// Without NaN the step is branch-free apart from the leaf
			// test, so that speculation runs ahead through many trees.
			for _, t := range act {
				nd := &nodes[cur[t]]
				if nd.kid < 0 {
					cur[t] = ^nd.kid
					continue
				}
				j := nd.feat ^ (nd.feat >> 31) // feature, with or without the NaN bit
				var right int32
				if !(x[j] <= nd.thr) {
					right = 1
				}
				cur[t] = nd.kid + right
				act[k] = t
				k++
			}
		} else {
			for _, t := range act {
				nd := &nodes[cur[t]]
				if nd.kid < 0 {
					cur[t] = ^nd.kid
					continue
				}
				j, nanLeft := nd.feat, false
				if j < 0 {
					j, nanLeft = ^j, true
				}
				v := x[j]
				if v <= nd.thr || (nanLeft && v != v) {
					cur[t] = nd.kid
				} else {
					cur[t] = nd.kid + 1
				}
				act[k] = t
				k++
			}
		}
		act = act[:k]
	}
	// cur now holds each tree's leaf.
	keys := s.keys[:0]
	for t, l := range cur {
		rows := f.ranks[f.bounds[l]:f.bounds[l+1]]
		s.weight[t] = 1 / float64(len(rows))
		for _, r := range rows {
			keys = append(keys, uint64(r)<<32|uint64(t))
		}
	}
	s.keys = keys
	return keys
}

// sort sorts keys by rank (their high 32 bits) with a least-significant
// digit radix sort over the bits that ranks below f.n can use: two passes
// of at most 8 bits up to 65536 training rows. Keys of equal rank keep
// their order. The result lives in s.keys or s.tmp.
func (s *Scratch) sort(keys []uint64, rows int) []uint64 {
	if cap(s.tmp) < len(keys) {
		s.tmp = make([]uint64, len(keys), cap(s.keys))
	}
	nbits := bits.Len(uint(rows - 1))
	if nbits == 0 {
		return keys
	}
	passes := (nbits + 7) / 8
	width := (nbits + passes - 1) / passes
	mask := uint64(1)<<width - 1
	count := s.count[:1<<width]
	a, b := keys, s.tmp[:len(keys)]
	for p := 0; p < passes; p++ {
		shift := 32 + p*width
		clear(count)
		for _, k := range a {
			count[k>>shift&mask]++
		}
		var sum int32
		for d, c := range count {
			count[d] = sum
			sum += c
		}
		for _, k := range a {
			d := k >> shift & mask
			b[count[d]] = k
			count[d]++
		}
		a, b = b, a
	}
	return a
}
