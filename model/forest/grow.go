package forest

import (
	"cmp"
	"math"
	"math/bits"
	"math/rand/v2"
	"slices"
	"sync"
)

// data is the read-only view of the training set that every tree grower
// shares.
//
// Features enter the split search as ranks: feature j's distinct non-NaN
// values, ascending, are uniq[uoff[j]:uoff[j+1]], a row's rank is the index
// of its value there, and NaN has the rank past the last value. A sample
// entry packs rank << 32 | row into one uint64, so that the split search
// reads each node's rows in feature order without touching the features.
type data struct {
	n, p   int
	x      []float64 // row-major, as given to Fit
	yc     []float64 // responses minus their mean (for better-conditioned sums)
	inv    []float64 // inv[k] = 1/k, k = 1..n (inv[0] unused)
	byY    []int32   // rows in ascending order of (y, row)
	sorted []float64 // y in ascending order: sorted[r] = y[byY[r]]
	order  []uint64  // per feature j, order[j*n:(j+1)*n]: rank << 32 | row, ascending
	uniq   []float64 // every feature's distinct values, see above
	uoff   []int     // feature j's values start at uniq[uoff[j]]; len p+1
}

// nanRank returns the rank of NaN for feature j.
func (d *data) nanRank(j int) uint64 { return uint64(d.uoff[j+1] - d.uoff[j]) }

// prepare presorts the training set.
func prepare(X []float64, p int, y []float64) *data {
	n := len(y)
	d := &data{
		n: n, p: p, x: X,
		yc:     make([]float64, n),
		inv:    make([]float64, n+1),
		byY:    make([]int32, n),
		sorted: make([]float64, n),
		order:  make([]uint64, n*p),
		uoff:   make([]int, 1, p+1),
	}
	for k := 1; k <= n; k++ {
		d.inv[k] = 1 / float64(k)
	}
	var mean float64
	for _, v := range y {
		mean += v
	}
	mean /= float64(n)
	for i, v := range y {
		d.yc[i] = v - mean
		d.byY[i] = int32(i)
	}
	// Ties are broken by row so that the order is unique, whatever the sort
	// algorithm.
	slices.SortFunc(d.byY, func(a, b int32) int {
		if c := cmp.Compare(y[a], y[b]); c != 0 {
			return c
		}
		return cmp.Compare(a, b)
	})
	for r, i := range d.byY {
		d.sorted[r] = y[i]
	}
	rows := make([]int32, n)
	for j := 0; j < p; j++ {
		for i := range rows {
			rows[i] = int32(i)
		}
		// cmp.Compare orders NaN before every number; NaN must come last.
		slices.SortFunc(rows, func(a, b int32) int {
			va, vb := X[int(a)*p+j], X[int(b)*p+j]
			na, nb := va != va, vb != vb
			switch {
			case na && nb:
				return cmp.Compare(a, b)
			case na:
				return 1
			case nb:
				return -1
			}
			if c := cmp.Compare(va, vb); c != 0 {
				return c
			}
			return cmp.Compare(a, b)
		})
		base := len(d.uniq)
		for _, i := range rows {
			v := X[int(i)*p+j]
			if v == v && (len(d.uniq) == base || d.uniq[len(d.uniq)-1] != v) {
				d.uniq = append(d.uniq, v)
			}
		}
		d.uoff = append(d.uoff, len(d.uniq))
		nan := d.nanRank(j)
		ord := d.order[j*n : (j+1)*n]
		r := -1
		for k, i := range rows {
			v := X[int(i)*p+j]
			rank := nan
			if v == v {
				if r < 0 || d.uniq[base+r] != v {
					r++
				}
				rank = uint64(r)
			}
			ord[k] = rank<<32 | uint64(i)
		}
	}
	return d
}

// tree is one grown tree before it joins the forest: its nodes with local
// indices and its leaves' bounds (len leaves+1) into its n ranks.
type tree struct {
	nodes  []node
	bounds []int32
}

// grow grows r.trees trees on r.workers goroutines and assembles the forest.
func grow(d *data, r resolved) *Forest {
	trees := make([]tree, r.trees)
	ranks := make([]int32, r.trees*d.n) // tree t fills ranks[t*n:(t+1)*n]
	var wg sync.WaitGroup
	var mu sync.Mutex
	next := 0
	for w := 0; w < r.workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			g := newGrower(d, r)
			for {
				mu.Lock()
				t := next
				next++
				mu.Unlock()
				if t >= r.trees {
					return
				}
				trees[t] = g.tree(t, ranks[t*d.n:(t+1)*d.n])
			}
		}()
	}
	wg.Wait()

	f := &Forest{p: d.p, n: d.n, trees: r.trees, sorted: d.sorted, roots: make([]int32, r.trees)}
	var nodes, leaves int
	for _, t := range trees {
		nodes += len(t.nodes)
		leaves += len(t.bounds) - 1
	}
	f.nodes = make([]node, 0, nodes)
	f.bounds = make([]int32, 0, leaves+1)
	f.ranks = ranks
	for i, t := range trees {
		base, leaf, off := int32(len(f.nodes)), int32(len(f.bounds)), int32(i*d.n)
		f.roots[i] = base
		for _, nd := range t.nodes {
			if nd.kid >= 0 {
				nd.kid += base
			} else {
				nd.kid = ^(^nd.kid + leaf)
			}
			f.nodes = append(f.nodes, nd)
		}
		for _, b := range t.bounds[:len(t.bounds)-1] {
			f.bounds = append(f.bounds, b+off)
		}
		trees[i] = tree{} // let the collector have it
	}
	f.bounds = append(f.bounds, int32(len(f.ranks)))
	return f
}

// grower holds one goroutine's buffers for growing trees; they are reset
// for every tree so that a tree does not depend on which grower grew it.
type grower struct {
	d     *data
	r     resolved
	rng   *rand.PCG
	m     int      // rows in each tree's sample (with multiplicity)
	cnt   []int32  // times each row was drawn
	perm  []int32  // for sampling without replacement
	ord   []uint64 // per feature j, ord[j*m:(j+1)*m]: the sample as rank << 32 | row, ascending
	tmp   []uint64
	left  []uint8 // 1 if a row goes left at the node being split, else 0
	feats []int
	stack []frame
	leaf  []int32 // leaf of each training row
	pos   []int32 // next free slot of each leaf
	nodes []node
}

// frame is a node waiting to be grown: its index and its sample range.
type frame struct {
	node, lo, hi, depth int
}

func newGrower(d *data, r resolved) *grower {
	return &grower{
		d: d, r: r, m: r.sample,
		rng:   rand.NewPCG(0, 0),
		cnt:   make([]int32, d.n),
		ord:   make([]uint64, d.p*r.sample+4), // slack: see tree
		tmp:   make([]uint64, r.sample),
		pos:   make([]int32, r.sample),
		left:  make([]uint8, d.n),
		feats: make([]int, d.p),
		leaf:  make([]int32, d.n),
	}
}

// splitmix64 is the SplitMix64 finaliser, used to spread (seed, tree) over
// the PCG state.
func splitmix64(z uint64) uint64 {
	z += 0x9e3779b97f4a7c15
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// intn returns a uniform integer in [0, n), n > 0, by Lemire's
// multiply-and-reject method on the PCG output (defined here rather than
// taken from math/rand/v2 so that the stream is fixed by this package).
func (g *grower) intn(n int) int {
	un := uint64(n)
	hi, lo := bits.Mul64(g.rng.Uint64(), un)
	if lo < un {
		thresh := -un % un
		for lo < thresh {
			hi, lo = bits.Mul64(g.rng.Uint64(), un)
		}
	}
	return int(hi)
}

// tree grows tree t and writes the ranks of its leaves' rows to ranks
// (len n).
func (g *grower) tree(t int, ranks []int32) tree {
	d, m := g.d, g.m
	s1 := splitmix64(g.r.seed)
	g.rng.Seed(splitmix64(s1^uint64(t)), splitmix64(s1+uint64(t)+0x632be59bd9b4e019))

	// Draw the sample.
	clear(g.cnt)
	if g.r.replace {
		for k := 0; k < m; k++ {
			g.cnt[g.intn(d.n)]++
		}
	} else {
		if g.perm == nil {
			g.perm = make([]int32, d.n)
		}
		for i := range g.perm {
			g.perm[i] = int32(i)
		}
		for k := 0; k < m; k++ {
			j := k + g.intn(d.n-k)
			g.perm[k], g.perm[j] = g.perm[j], g.perm[k]
			g.cnt[g.perm[k]] = 1
		}
	}
	// Sort it by every feature, from the presorted orders. Each entry is
	// written four times ahead and the position advanced by its count, which
	// saves a branch on the count (0 to 3 for all but 2 % of draws); the
	// excess lands in slack or in the next feature's part, written later.
	for j := 0; j < d.p; j++ {
		out, w := g.ord[j*m:], 0
		for _, e := range d.order[j*d.n : (j+1)*d.n] {
			c := int(g.cnt[uint32(e)])
			o := out[w : w+4 : w+4]
			o[0], o[1], o[2], o[3] = e, e, e, e
			for k := 4; k < c; k++ {
				out[w+k] = e
			}
			w += c
		}
	}
	for j := range g.feats {
		g.feats[j] = j
	}

	g.nodes = g.nodes[:0]
	g.nodes = append(g.nodes, node{})
	g.stack = append(g.stack[:0], frame{node: 0, lo: 0, hi: m})
	leaves := int32(0)
	for len(g.stack) > 0 {
		fr := g.stack[len(g.stack)-1]
		g.stack = g.stack[:len(g.stack)-1]
		sp, ok := g.split(fr)
		if !ok {
			g.nodes[fr.node] = node{kid: ^leaves}
			leaves++
			continue
		}
		nl := g.partition(fr, sp)
		kid := len(g.nodes)
		feat := int32(sp.feat)
		if sp.nanLeft {
			feat = ^feat
		}
		g.nodes[fr.node] = node{thr: sp.thr, feat: feat, kid: int32(kid)}
		g.nodes = append(g.nodes, node{}, node{})
		// Right first so that the left subtree is grown (and numbered) first.
		g.stack = append(g.stack,
			frame{node: kid + 1, lo: fr.lo + nl, hi: fr.hi, depth: fr.depth + 1},
			frame{node: kid, lo: fr.lo, hi: fr.lo + nl, depth: fr.depth + 1})
	}

	// Fill the leaves with all n training rows, each leaf's ranks ascending.
	out := tree{
		nodes:  slices.Clone(g.nodes),
		bounds: make([]int32, leaves+1),
	}
	for i := 0; i < d.n; i++ {
		l := leafOf(g.nodes, 0, d.x[i*d.p:(i+1)*d.p])
		g.leaf[i] = l
		out.bounds[l+1]++
	}
	for l := int32(0); l < leaves; l++ {
		if out.bounds[l+1] == 0 {
			panic("forest: internal error: a leaf holds no training row")
		}
		out.bounds[l+1] += out.bounds[l]
	}
	pos := g.pos[:leaves]
	copy(pos, out.bounds[:leaves])
	for r, i := range d.byY {
		l := g.leaf[i]
		ranks[pos[l]] = int32(r)
		pos[l]++
	}
	return out
}

// leafOf returns the leaf index that row x reaches from the root at index
// root.
func leafOf(nodes []node, root int32, x []float64) int32 {
	i := root
	for {
		nd := &nodes[i]
		if nd.kid < 0 {
			return ^nd.kid
		}
		j, nanLeft := nd.feat, false
		if j < 0 {
			j, nanLeft = ^j, true
		}
		v := x[j]
		if v <= nd.thr || (nanLeft && v != v) {
			i = nd.kid
		} else {
			i = nd.kid + 1
		}
	}
}

// candidate is a split under consideration. Rows of the node go left when
// their rank is at most cut, and NaN rows when nanLeft; for prediction the
// same split reads x <= thr, with thr between the values of rank cut and
// the next rank present in the node.
type candidate struct {
	feat    int
	cut     uint64
	thr     float64
	nanLeft bool
	score   float64 // sL^2/nL + sR^2/nR; larger is better
}

// split finds the best split of the node's sample, by the CART criterion
// (largest reduction of the sum of squared deviations of y), or reports
// that the node is a leaf.
func (g *grower) split(fr frame) (candidate, bool) {
	d, m := g.d, g.m
	minLeaf := g.r.minLeaf
	size := fr.hi - fr.lo
	if size < 2*minLeaf || (g.r.maxDepth > 0 && fr.depth >= g.r.maxDepth) {
		return candidate{}, false
	}
	// Node totals, and whether y is constant.
	var s, ss float64
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, e := range g.ord[fr.lo:fr.hi] {
		v := d.yc[uint32(e)]
		s += v
		ss += float64(v * v)
		lo, hi = min(lo, v), max(hi, v)
	}
	if lo == hi {
		return candidate{}, false
	}

	best := candidate{score: math.Inf(-1)}
	found := false
	for k := 0; k < d.p; k++ {
		if k >= g.r.mtry && found {
			break
		}
		r := k + g.intn(d.p-k)
		g.feats[k], g.feats[r] = g.feats[r], g.feats[k]
		j := g.feats[k]
		if g.scan(j, g.ord[j*m+fr.lo:j*m+fr.hi], s, &best) {
			found = true
		}
	}
	if !found {
		return candidate{}, false
	}
	fn := float64(size)
	gain := best.score - float64(s*s)/fn
	if !(gain > 1e-12*ss) {
		return candidate{}, false
	}
	return best, true
}

// scan tries every split of feature j over the node's sample list (sorted
// by rank, NaN last) whose total response is s, updating best. It reports
// whether any split met MinLeaf.
func (g *grower) scan(j int, list []uint64, s float64, best *candidate) bool {
	d := g.d
	yc, inv := d.yc, d.inv
	uniq := d.uniq[d.uoff[j]:d.uoff[j+1]]
	nan := d.nanRank(j)
	minLeaf := g.r.minLeaf
	size := len(list)
	k := size // rows with a number: list[:k]
	for k > 0 && list[k-1]>>32 == nan {
		k--
	}
	nNaN := size - k
	var sNaN float64
	for _, e := range list[k:] {
		sNaN += yc[uint32(e)]
	}
	valid := false
	// score rates the partition into a left part (sl, nl) and the rest.
	score := func(sl float64, nl int) float64 {
		sr := s - sl
		return float64(sl*sl*inv[nl]) + float64(sr*sr*inv[size-nl])
	}
	// The best split so far is kept in locals and written to best at the
	// end: improvements are frequent along a scan.
	bestScore := best.score
	var bestCut, bestNext uint64
	bestKind, bestNl := 0, 0 // kind 0: none; 1: NaN right; 2: NaN left
	if nNaN == 0 {
		var ok bool
		ok, bestScore, bestCut, bestNext, bestNl = scanNumbers(list, yc, inv, s, minLeaf, bestScore)
		valid = ok
		if bestNl > 0 {
			bestKind = 1
		}
	}
	var sl float64
	var next uint64
	if k > 0 && nNaN > 0 {
		next = list[0] >> 32
	}
	for a := 0; nNaN > 0 && a < k-1; a++ {
		sl += yc[uint32(list[a])]
		r := next
		next = list[a+1] >> 32
		if r == next {
			continue
		}
		nl := a + 1
		if nl >= minLeaf && size-nl >= minLeaf {
			valid = true
			if sc := score(sl, nl); sc > bestScore {
				bestScore, bestCut, bestNext, bestKind, bestNl = sc, r, next, 1, nl
			}
		}
		if nNaN > 0 {
			if nl := nl + nNaN; nl >= minLeaf && size-nl >= minLeaf {
				valid = true
				if sc := score(sl+sNaN, nl); sc > bestScore {
					bestScore, bestCut, bestNext, bestKind = sc, r, next, 2
				}
			}
		}
	}
	if bestKind != 0 {
		nanLeft := bestKind == 2
		if nNaN == 0 {
			nanLeft = 2*bestNl >= size // NaN unseen here: it follows the majority
		}
		*best = candidate{feat: j, cut: bestCut, thr: midpoint(uniq[bestCut], uniq[bestNext]), nanLeft: nanLeft, score: bestScore}
	}
	// Numbers on the left, NaN on the right.
	if nNaN > 0 && k >= minLeaf && nNaN >= minLeaf {
		valid = true
		if sc := score(s-sNaN, k); sc > best.score {
			*best = candidate{feat: j, cut: nan - 1, thr: math.Inf(1), score: sc}
		}
	}
	return valid
}

// scanNumbers is the split search of scan for a list free of NaN, kept
// apart so that its loop stays small. It reports whether any split met
// MinLeaf and returns the best score above best with its cut rank, the next
// rank and the left count (0 if none was better).
func scanNumbers(list []uint64, yc, inv []float64, s float64, minLeaf int, best float64) (valid bool, score float64, cut, next uint64, nl int) {
	size := len(list)
	if size < 2*minLeaf {
		return false, best, 0, 0, 0
	}
	score = best
	var sl float64
	for _, e := range list[:minLeaf-1] {
		sl += yc[uint32(e)]
	}
	// Left counts a+1 run over [minLeaf, size-minLeaf]. A cut is possible
	// between a and a+1 only if their ranks differ, and there is one in
	// that range iff its ends differ. The loop scores tied positions too and
	// tests the tie only for a better score: a tie test on every position
	// would be a branch as unpredictable as the bootstrap's duplicates.
	valid = list[minLeaf-1]>>32 != list[size-minLeaf]>>32
	inv = inv[:size+1]
	for a := minLeaf - 1; a < size-minLeaf; a++ {
		e := list[a]
		sl += yc[uint32(e)]
		sr := s - sl
		if sc := float64(sl*sl*inv[a+1]) + float64(sr*sr*inv[size-a-1]); sc > score {
			if r, nx := e>>32, list[a+1]>>32; r != nx {
				score, cut, next, nl = sc, r, nx, a+1
			}
		}
	}
	return valid, score, cut, next, nl
}

// midpoint returns a threshold t with a <= t < b for a < b: their midpoint
// when it is representable and strictly below b, else a.
func midpoint(a, b float64) float64 {
	t := a + (b-a)/2
	if !(t >= a && t < b) {
		return a
	}
	return t
}

// partition splits the node's sample lists of every feature, stably, into
// the rows that go left and those that go right, and returns how many go
// left.
func (g *grower) partition(fr frame, sp candidate) int {
	d, m := g.d, g.m
	nan := d.nanRank(sp.feat)
	nl := 0
	for _, e := range g.ord[sp.feat*m+fr.lo : sp.feat*m+fr.hi] {
		r := e >> 32
		if r <= sp.cut || (sp.nanLeft && r == nan) {
			g.left[uint32(e)] = 1
			nl++
		} else {
			g.left[uint32(e)] = 0
		}
	}
	// Children too small or too deep to split never read their lists.
	size, minLeaf := fr.hi-fr.lo, g.r.minLeaf
	if (nl < 2*minLeaf && size-nl < 2*minLeaf) || (g.r.maxDepth > 0 && fr.depth+1 >= g.r.maxDepth) {
		return nl
	}
	tmp := g.tmp[:size]
	for j := 0; j < d.p; j++ {
		list := g.ord[j*m+fr.lo : j*m+fr.hi]
		// Branch-free: write each entry to both sides, advance one.
		w, t := 0, 0
		for _, e := range list {
			l := int(g.left[uint32(e)])
			list[w] = e
			tmp[t] = e
			w += l
			t += 1 - l
		}
		copy(list[w:], tmp[:t])
	}
	return nl
}
