// Package forest holds a quantile regression forest: the nonlinear learner
// that turns weather features into conditional quantiles of a site's power
// per unit of capacity.
//
// The method is Meinshausen's (N. Meinshausen, "Quantile Regression
// Forests", Journal of Machine Learning Research 7, 2006; METHODS.md
// section 3). Trees are grown as in a random forest: each on its
// own random sample of the rows, each split chosen among a random subset of
// the features by the CART criterion, the reduction of the squared error of
// y. Unlike a regression forest, which keeps one mean per leaf, the forest
// keeps every observation. For a new feature row x, every training row i
// gets the weight
//
//	w_i(x) = (1/T) sum_t 1{X_i in leaf_t(x)} / #{j : X_j in leaf_t(x)},
//
// the estimated conditional distribution is F(y | x) = sum_i w_i(x) 1{Y_i <= y},
// and the quantile at level tau is inf{y : F(y | x) >= tau}. As in the
// paper, the leaves are filled with all n original rows (dropped down each
// tree after it has grown), not only with the rows the tree was grown on.
//
// # Missing features
//
// NaN features are allowed in training and in prediction. Every split
// learns a side for NaN: when NaN rows reach the node, the split search
// tries them on the left and on the right (and a split that separates NaN
// from all other values) and keeps the best; when none reach it, NaN goes
// to the child that received more of the node's sampled rows, the left one
// on a tie. Infinite features are ordinary values.
//
// # Determinism and concurrency
//
// Fit is a pure function of its arguments: the same data, options and seed
// give an identical forest on every platform and for any Workers setting
// (each tree draws from its own PCG stream derived from the seed and its
// index; no floating-point result depends on the scheduling). A Forest is
// immutable once Fit returns, so any number of goroutines may call
// Quantiles on it at once, each with its own Scratch, while another Fit
// runs. Fit keeps no package state.
//
// # Memory and allocation
//
// Each tree keeps its nodes (16 bytes each) and, for its leaves, the ranks
// of all n training responses (4 bytes per row) with 4 bytes of bounds per
// leaf; the forest keeps the n sorted responses once. With the default
// MinLeaf that is about 10 bytes per tree and training row: some 15 MB for
// 100 trees on 15 000 rows (Forest.Bytes reports it). Fit needs, besides,
// about 8 bytes per feature and sampled row per worker. Quantiles does not
// allocate once its Scratch has grown to the forest's size.
package forest

import (
	"errors"
	"fmt"
	"math"
)

// Sentinel errors returned (wrapped) by Fit, for callers that branch on the
// cause.
var (
	// ErrEmpty reports a fit with no training rows.
	ErrEmpty = errors.New("forest: no training rows")
	// ErrInput reports malformed training data: a shape mismatch, p < 1,
	// a NaN or infinite response, or a data set too large to index.
	ErrInput = errors.New("forest: bad training data")
	// ErrOptions reports an Options field out of range.
	ErrOptions = errors.New("forest: bad options")
)

// Options tunes Fit. The zero value grows 100 trees, each on a bootstrap
// sample, with at least 5 sampled rows per leaf and ceil(p/3) features tried
// per split. Negative values are errors.
type Options struct {
	// Trees is the number of trees; zero means 100.
	Trees int
	// MinLeaf is the least number of sampled rows (a row drawn twice counts
	// twice) each child of a split must receive; a node with fewer than
	// 2*MinLeaf rows is a leaf. Zero means 5.
	MinLeaf int
	// MaxFeatures is the number of features, drawn at random without
	// replacement, whose splits are compared at each node; it must not
	// exceed p. If none of them can split the node (each is constant there,
	// or has no cut that leaves MinLeaf rows on both sides), further
	// features are drawn one at a time until one can or all have been
	// tried. Zero means ceil(p/3).
	MaxFeatures int
	// SampleFraction is the size of each tree's sample as a fraction of the
	// n training rows (rounded, at least one row), in (0, 1]. Zero means 1:
	// with the default WithoutReplacement false this is the classic
	// bootstrap of n draws with replacement.
	SampleFraction float64
	// WithoutReplacement draws each tree's sample without replacement
	// (subsampling) instead of with replacement (bootstrap, the default).
	WithoutReplacement bool
	// MaxDepth bounds the depth of every tree (the root has depth 0, so
	// MaxDepth 1 gives stumps). Zero means unlimited: a node is then a leaf
	// only when MinLeaf forbids a split, its responses are all equal or no
	// split reduces their squared error.
	MaxDepth int
	// Seed selects the random streams. Same data, options and seed give the
	// same forest on every platform; zero is a seed like any other.
	Seed uint64
	// Workers is the number of goroutines that grow trees; Fit waits for
	// them before it returns. Zero means 1. The forest does not depend on it.
	Workers int
}

// resolved holds Options with defaults filled in and checked against the
// data.
type resolved struct {
	trees, minLeaf, mtry, sample, maxDepth, workers int
	replace                                         bool
	seed                                            uint64
}

func (o Options) resolve(n, p int) (resolved, error) {
	r := resolved{
		trees:    o.Trees,
		minLeaf:  o.MinLeaf,
		mtry:     o.MaxFeatures,
		maxDepth: o.MaxDepth,
		workers:  o.Workers,
		replace:  !o.WithoutReplacement,
		seed:     o.Seed,
	}
	switch {
	case o.Trees < 0:
		return r, fmt.Errorf("%w: Trees = %d is negative", ErrOptions, o.Trees)
	case o.MinLeaf < 0:
		return r, fmt.Errorf("%w: MinLeaf = %d is negative", ErrOptions, o.MinLeaf)
	case o.MaxFeatures < 0 || o.MaxFeatures > p:
		return r, fmt.Errorf("%w: MaxFeatures = %d is outside [0, p = %d]", ErrOptions, o.MaxFeatures, p)
	case !(o.SampleFraction >= 0 && o.SampleFraction <= 1):
		return r, fmt.Errorf("%w: SampleFraction = %v is outside [0, 1]", ErrOptions, o.SampleFraction)
	case o.MaxDepth < 0:
		return r, fmt.Errorf("%w: MaxDepth = %d is negative", ErrOptions, o.MaxDepth)
	case o.Workers < 0:
		return r, fmt.Errorf("%w: Workers = %d is negative", ErrOptions, o.Workers)
	}
	if r.trees == 0 {
		r.trees = 100
	}
	if r.minLeaf == 0 {
		r.minLeaf = 5
	}
	if r.mtry == 0 {
		r.mtry = (p + 2) / 3
	}
	frac := o.SampleFraction
	if frac == 0 {
		frac = 1
	}
	r.sample = max(1, int(math.Round(frac*float64(n))))
	if r.workers == 0 {
		r.workers = 1
	}
	r.workers = min(r.workers, r.trees)
	return r, nil
}

// Forest is a fitted quantile regression forest. It is immutable and safe
// for concurrent use by multiple goroutines.
type Forest struct {
	p      int // features per row
	n      int // training rows
	trees  int
	nodes  []node  // every tree's nodes; tree t starts at roots[t]
	roots  []int32 // index of each tree's root in nodes
	bounds []int32 // leaf l holds ranks[bounds[l]:bounds[l+1]]
	ranks  []int32 // per leaf, ascending ranks of its rows' responses
	sorted []float64
}

// node is one tree node in 16 bytes. A split sends x left when
// x[feature] <= thr, and a NaN feature to the side it learned; its right
// child follows its left child. A leaf stores its leaf index.
type node struct {
	thr  float64
	feat int32 // split feature j, or ^j when NaN goes left
	kid  int32 // split: index of the left child; leaf: ^(leaf index)
}

// Features returns p, the number of features per row the forest was fitted
// on and Quantiles expects.
func (f *Forest) Features() int { return f.p }

// Trees returns the number of trees.
func (f *Forest) Trees() int { return f.trees }

// Rows returns n, the number of training rows whose responses the leaves
// hold.
func (f *Forest) Rows() int { return f.n }

// Fit grows a forest on n rows of p features. X is row-major, len(X) must
// be n*p with n = len(y); row i is X[i*p : (i+1)*p] and its response y[i].
// Features may be NaN or infinite (see the package doc for NaN); responses
// must be finite. Fit reads X and y while it runs (they must not change
// meanwhile) and keeps no reference to them.
//
// Errors wrap ErrEmpty (n = 0), ErrInput (p < 1, len(X) != n*p, a
// non-finite y, more than about 2^30 tree-rows) or ErrOptions.
func Fit(X []float64, p int, y []float64, o Options) (*Forest, error) {
	n := len(y)
	if p < 1 {
		return nil, fmt.Errorf("%w: p = %d features, need at least 1", ErrInput, p)
	}
	if n == 0 {
		return nil, fmt.Errorf("%w: len(y) = 0", ErrEmpty)
	}
	if len(X) != n*p {
		return nil, fmt.Errorf("%w: len(X) = %d, want n*p = %d*%d = %d", ErrInput, len(X), n, p, n*p)
	}
	for i, v := range y {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil, fmt.Errorf("%w: y[%d] = %v is not finite", ErrInput, i, v)
		}
	}
	r, err := o.resolve(n, p)
	if err != nil {
		return nil, err
	}
	// Nodes and ranks are indexed by int32: each tree holds n ranks and
	// fewer than 2*sample nodes.
	if int64(r.trees)*int64(max(n, 2*r.sample)) > math.MaxInt32 {
		return nil, fmt.Errorf("%w: %d trees of %d rows are too many to index", ErrInput, r.trees, n)
	}
	return grow(prepare(X, p, y), r), nil
}

// Bytes returns the memory the forest's arrays hold, in bytes.
func (f *Forest) Bytes() int {
	return 16*len(f.nodes) + 4*(len(f.roots)+len(f.bounds)+len(f.ranks)) + 8*len(f.sorted)
}
