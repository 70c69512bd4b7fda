package qr

import (
	"errors"
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/mat"

	"github.com/plumb-forecast/plumb/model/score"
)

// Errors returned by Fit for conditions caused by the data.
var (
	// ErrTooFewRows: there are fewer observations than coefficients.
	ErrTooFewRows = errors.New("qr: fewer rows than columns")
	// ErrNonFinite: X or y holds a NaN or an infinity.
	ErrNonFinite = errors.New("qr: non-finite value in the data")
	// ErrRankDeficient: the columns of X are linearly dependent (or so close
	// to it that the coefficients are not determined by the data).
	ErrRankDeficient = errors.New("qr: design matrix is rank deficient")
	// ErrNoConvergence: the interior-point iteration did not reach its
	// tolerance (a numerical failure; it has not been seen on real data).
	ErrNoConvergence = errors.New("qr: interior-point method did not converge")
)

// Solver constants, documented because they bound what Fit promises.
const (
	// fitGapTol is the relative duality gap at which the interior-point
	// iteration stops: (primal - dual) <= fitGapTol * (1 + primal), on data
	// scaled so that max |y| = 1.
	fitGapTol = 1e-12
	// fitMaxIter bounds the interior-point iterations; the Mehrotra
	// predictor-corrector usually needs 15 to 40.
	fitMaxIter = 200
	// fitStepFrac is the fraction of the longest feasible step taken, which
	// keeps the iterates strictly inside the positive orthant.
	fitStepFrac = 0.99995
	// fitMaxCond is the largest condition number of the column-scaled X
	// (ratio of its extreme singular values) that Fit accepts.
	fitMaxCond = 1e8
)

// Fit returns the linear quantile regression of y on the columns of X at
// level tau: the coefficients beta that minimise the summed pinball loss
//
//	sum_i rho_tau(x_i' beta, y_i),  rho_tau(q, y) = (1{y < q} - tau) (q - y),
//
// and that minimum, loss (METHODS.md section 3; Koenker and Bassett,
// "Regression quantiles", Econometrica 46(1), 1978).
//
// X is row-major with n = len(y) rows and p columns; the caller includes a
// column of ones if it wants an intercept. Fit does not keep or modify X or
// y; beta is newly allocated and owned by the caller.
//
// # Method
//
// The problem is the linear programme
//
//	minimise tau 1'u + (1 - tau) 1'v  subject to  X beta + u - v = y,  u, v >= 0,
//
// whose dual is: maximise y'd subject to X'd = 0, tau - 1 <= d <= tau.
// Fit solves the pair with a primal-dual interior-point method with
// Mehrotra's predictor-corrector steps (the "Frisch-Newton" approach of
// Portnoy and Koenker, "The Gaussian hare and the Laplacian tortoise",
// Statistical Science 12(4), 1997, which is what R's quantreg uses for
// large n; Mehrotra, SIAM J. Optimization 2(4), 1992). Each iteration costs
// O(n p^2): it solves one p x p system X' W X for the step. Columns of X and
// y are scaled to unit maximum inside the solver, so the result does not
// depend on the units of the data. The iteration stops at a relative
// duality gap of 1e-12. Because a linear programme has an optimal vertex,
// and a vertex of this one interpolates p observations, Fit then tries the
// "basic" solution through the p observations with the smallest residuals
// and keeps it when its loss is no larger: the returned beta is then an
// exact vertex (as a simplex method would give) whenever the interior-point
// solution lies next to one. When the minimiser is not unique (possible
// when n tau is an integer, or with tied data), any minimiser may be
// returned; loss is the same.
//
// gonum's dense simplex (gonum.org/v1/gonum/optimize/convex/lp) solves the
// same programme on continuous data and agrees (the tests use it as a
// cross-check), but it needs an n x (2n + 2p) dense matrix and an O(n^3)
// solve per pivot (about a second for n = 235), and it reports some tied
// problems, such as many identical night-time rows of a PV site, as
// unbounded. This method takes about 0.4 s for n = 100 000, p = 5
// (BenchmarkFit) and handles ties.
//
// # Errors and misuse
//
// Fit panics if p < 1, len(X) != len(y)*p, or tau is not inside (0, 1).
// It returns ErrTooFewRows when len(y) < p, ErrNonFinite when the data holds
// a NaN or an infinity, ErrRankDeficient when the columns of X are
// (numerically) dependent, and ErrNoConvergence if the iteration fails.
// Errors are wrapped; test them with errors.Is.
func Fit(X []float64, p int, y []float64, tau float64) (beta []float64, loss float64, err error) {
	if p < 1 {
		panic("qr: Fit needs p >= 1")
	}
	if len(X) != len(y)*p {
		panic(fmt.Sprintf("qr: Fit needs len(X) = len(y)*p, got %d != %d*%d", len(X), len(y), p))
	}
	if !(tau > 0 && tau < 1) {
		panic("qr: Fit needs a level tau inside (0, 1)")
	}
	n := len(y)
	if n < p {
		return nil, 0, fmt.Errorf("qr: fit: %d rows, %d columns: %w", n, p, ErrTooFewRows)
	}
	for i, v := range X {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil, 0, fmt.Errorf("qr: fit: X[%d, %d] = %v: %w", i/p, i%p, v, ErrNonFinite)
		}
	}
	for i, v := range y {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil, 0, fmt.Errorf("qr: fit: y[%d] = %v: %w", i, v, ErrNonFinite)
		}
	}

	// Scale each column and y to unit maximum absolute value.
	colScale := make([]float64, p)
	for i := 0; i < n; i++ {
		for j := 0; j < p; j++ {
			colScale[j] = math.Max(colScale[j], math.Abs(X[i*p+j]))
		}
	}
	for j, s := range colScale {
		if s == 0 {
			return nil, 0, fmt.Errorf("qr: fit: column %d is all zero: %w", j, ErrRankDeficient)
		}
	}
	ys := 0.0
	for _, v := range y {
		ys = math.Max(ys, math.Abs(v))
	}
	if ys == 0 {
		ys = 1
	}
	xs := mat.NewDense(n, p, nil)
	yv := make([]float64, n)
	for i := 0; i < n; i++ {
		for j := 0; j < p; j++ {
			xs.Set(i, j, X[i*p+j]/colScale[j])
		}
		yv[i] = y[i] / ys
	}

	var svd mat.SVD
	if !svd.Factorize(xs, mat.SVDNone) {
		return nil, 0, fmt.Errorf("qr: fit: singular value decomposition failed: %w", ErrRankDeficient)
	}
	if c := svd.Cond(); !(c <= fitMaxCond) {
		return nil, 0, fmt.Errorf("qr: fit: condition number %.3g of the scaled design exceeds %.0g: %w", c, fitMaxCond, ErrRankDeficient)
	}

	bs, err := interiorPoint(xs, yv, tau)
	if err != nil {
		return nil, 0, fmt.Errorf("qr: fit: %w", err)
	}
	if bv := vertex(xs, yv, bs); bv != nil && scaledLoss(xs, yv, bv, tau) <= scaledLoss(xs, yv, bs, tau) {
		bs = bv
	}

	beta = make([]float64, p)
	for j := range beta {
		beta[j] = bs[j] * ys / colScale[j]
	}
	for i := 0; i < n; i++ {
		q := 0.0
		for j := 0; j < p; j++ {
			q += X[i*p+j] * beta[j]
		}
		loss += score.Pinball(q, y[i], tau)
	}
	return beta, loss, nil
}

// interiorPoint runs the Mehrotra predictor-corrector method on the scaled
// problem (see Fit) and returns beta. It starts from the least-squares fit,
// which is primal feasible with u, v shifted off zero, and from d = 0, which
// is dual feasible. Primal and dual residuals are carried in the Newton
// system, so rounding does not accumulate.
func interiorPoint(x *mat.Dense, y []float64, tau float64) ([]float64, error) {
	n, p := x.Dims()
	yv := mat.NewVecDense(n, y)

	// Least-squares start.
	beta := mat.NewVecDense(p, nil)
	if err := beta.SolveVec(x, yv); err != nil {
		return nil, fmt.Errorf("least-squares start: %v: %w", err, ErrRankDeficient)
	}
	r := mat.NewVecDense(n, nil)
	r.MulVec(x, beta)
	r.SubVec(yv, r)
	shift := 0.0
	for i := 0; i < n; i++ {
		shift += math.Abs(r.AtVec(i))
	}
	shift = math.Max(shift/float64(n), 1e-3)

	u := make([]float64, n)
	v := make([]float64, n)
	d := make([]float64, n)
	zu := make([]float64, n)
	zv := make([]float64, n)
	for i := 0; i < n; i++ {
		ri := r.AtVec(i)
		u[i] = math.Max(ri, 0) + shift
		v[i] = math.Max(-ri, 0) + shift
		zu[i] = tau
		zv[i] = 1 - tau
	}

	var (
		w      = make([]float64, n) // 1 / (u/zu + v/zv)
		rp     = mat.NewVecDense(n, nil)
		rd     = mat.NewVecDense(p, nil)
		h      = mat.NewVecDense(n, nil)
		wh     = mat.NewVecDense(n, nil)
		rhs    = mat.NewVecDense(p, nil)
		dbeta  = mat.NewVecDense(p, nil)
		xdb    = mat.NewVecDense(n, nil)
		m      = mat.NewSymDense(p, nil)
		wx     = mat.NewDense(n, p, nil)
		chol   mat.Cholesky
		cu     = make([]float64, n)
		cv     = make([]float64, n)
		ddAff  = make([]float64, n)
		duAff  = make([]float64, n)
		dvAff  = make([]float64, n)
		dd     = make([]float64, n)
		du     = make([]float64, n)
		dv     = make([]float64, n)
		dbAff  = mat.NewVecDense(p, nil)
		dvec   = mat.NewVecDense(n, d)
		primal float64
	)

	// solve computes the Newton direction for complementarity targets cu, cv
	// (u zu + du zu + u dzu = cu + u zu, and so on) into db, ddir, dudir, dvdir.
	solve := func(db *mat.VecDense, ddir, dudir, dvdir []float64) error {
		for i := 0; i < n; i++ {
			h.SetVec(i, rp.AtVec(i)-cu[i]/zu[i]+cv[i]/zv[i])
			wh.SetVec(i, w[i]*h.AtVec(i))
		}
		rhs.MulVec(x.T(), wh)
		rhs.SubVec(rhs, rd)
		if err := chol.SolveVecTo(db, rhs); err != nil {
			return fmt.Errorf("newton step: %v: %w", err, ErrNoConvergence)
		}
		xdb.MulVec(x, db)
		for i := 0; i < n; i++ {
			ddir[i] = w[i] * (h.AtVec(i) - xdb.AtVec(i))
			dudir[i] = (cu[i] + u[i]*ddir[i]) / zu[i]
			dvdir[i] = (cv[i] - v[i]*ddir[i]) / zv[i]
		}
		return nil
	}
	// steps returns the longest primal and dual steps in [0, 1] that keep
	// u, v, zu, zv non-negative (dzu = -dd, dzv = dd).
	steps := func(ddir, dudir, dvdir []float64) (ap, ad float64) {
		ap, ad = 1, 1
		for i := 0; i < n; i++ {
			if dudir[i] < 0 {
				ap = math.Min(ap, -u[i]/dudir[i])
			}
			if dvdir[i] < 0 {
				ap = math.Min(ap, -v[i]/dvdir[i])
			}
			if ddir[i] > 0 {
				ad = math.Min(ad, zu[i]/ddir[i])
			}
			if ddir[i] < 0 {
				ad = math.Min(ad, -zv[i]/ddir[i])
			}
		}
		return ap, ad
	}

	for iter := 0; iter < fitMaxIter; iter++ {
		// Residuals: rp = y - X beta - u + v, rd = -X'd.
		rp.MulVec(x, beta)
		gap := 0.0
		primal = 0
		for i := 0; i < n; i++ {
			rp.SetVec(i, y[i]-rp.AtVec(i)-u[i]+v[i])
			gap += u[i]*zu[i] + v[i]*zv[i]
			primal += tau*u[i] + (1-tau)*v[i]
		}
		rd.MulVec(x.T(), dvec)
		rd.ScaleVec(-1, rd)
		if gap <= fitGapTol*(1+primal) && mat.Norm(rp, math.Inf(1)) <= 1e-9 {
			return mat.Col(nil, 0, beta), nil
		}
		mu := gap / float64(2*n)

		// Normal matrix X' W X with W = 1 / (u/zu + v/zv).
		for i := 0; i < n; i++ {
			w[i] = 1 / (u[i]/zu[i] + v[i]/zv[i])
			for j := 0; j < p; j++ {
				wx.Set(i, j, w[i]*x.At(i, j))
			}
		}
		var mm mat.Dense
		mm.Mul(x.T(), wx)
		for a := 0; a < p; a++ {
			for b := a; b < p; b++ {
				m.SetSym(a, b, 0.5*(mm.At(a, b)+mm.At(b, a)))
			}
		}
		if !chol.Factorize(m) {
			return nil, fmt.Errorf("normal matrix not positive definite at iteration %d: %w", iter, ErrNoConvergence)
		}

		// Predictor (affine-scaling) direction.
		for i := 0; i < n; i++ {
			cu[i] = -u[i] * zu[i]
			cv[i] = -v[i] * zv[i]
		}
		if err := solve(dbAff, ddAff, duAff, dvAff); err != nil {
			return nil, err
		}
		ap, ad := steps(ddAff, duAff, dvAff)
		muAff := 0.0
		for i := 0; i < n; i++ {
			muAff += (u[i]+ap*duAff[i])*(zu[i]-ad*ddAff[i]) + (v[i]+ap*dvAff[i])*(zv[i]+ad*ddAff[i])
		}
		muAff /= float64(2 * n)
		sigma := math.Pow(muAff/mu, 3)

		// Corrector (centring plus second-order) direction.
		for i := 0; i < n; i++ {
			cu[i] = sigma*mu - u[i]*zu[i] + duAff[i]*ddAff[i]
			cv[i] = sigma*mu - v[i]*zv[i] - dvAff[i]*ddAff[i]
		}
		if err := solve(dbeta, dd, du, dv); err != nil {
			return nil, err
		}
		ap, ad = steps(dd, du, dv)
		ap = math.Min(1, fitStepFrac*ap)
		ad = math.Min(1, fitStepFrac*ad)
		beta.AddScaledVec(beta, ap, dbeta)
		for i := 0; i < n; i++ {
			u[i] += ap * du[i]
			v[i] += ap * dv[i]
			d[i] += ad * dd[i]
			zu[i] -= ad * dd[i]
			zv[i] += ad * dd[i]
		}
	}
	return nil, fmt.Errorf("no convergence in %d iterations: %w", fitMaxIter, ErrNoConvergence)
}

// vertex returns the basic solution through the p observations with the
// smallest absolute residuals under beta whose rows are linearly
// independent, or nil if there are not p such rows.
func vertex(x *mat.Dense, y, beta []float64) []float64 {
	n, p := x.Dims()
	res := make([]float64, n)
	idx := make([]int, n)
	for i := 0; i < n; i++ {
		q := 0.0
		for j := 0; j < p; j++ {
			q += x.At(i, j) * beta[j]
		}
		res[i] = math.Abs(y[i] - q)
		idx[i] = i
	}
	sort.SliceStable(idx, func(a, b int) bool { return res[idx[a]] < res[idx[b]] })

	// Pick rows greedily by Gram-Schmidt: a row joins when its component
	// orthogonal to the rows already chosen is not negligible.
	basis := make([][]float64, 0, p)
	chosen := make([]int, 0, p)
	for _, i := range idx {
		if len(chosen) == p {
			break
		}
		row := mat.Row(nil, i, x)
		norm0 := math.Sqrt(dot(row, row))
		for _, b := range basis {
			c := dot(row, b)
			for j := range row {
				row[j] -= c * b[j]
			}
		}
		norm := math.Sqrt(dot(row, row))
		if norm <= 1e-8*norm0 || norm == 0 {
			continue
		}
		for j := range row {
			row[j] /= norm
		}
		basis = append(basis, row)
		chosen = append(chosen, i)
	}
	if len(chosen) < p {
		return nil
	}
	a := mat.NewDense(p, p, nil)
	b := mat.NewVecDense(p, nil)
	for k, i := range chosen {
		for j := 0; j < p; j++ {
			a.Set(k, j, x.At(i, j))
		}
		b.SetVec(k, y[i])
	}
	var sol mat.VecDense
	if err := sol.SolveVec(a, b); err != nil {
		return nil
	}
	return mat.Col(nil, 0, &sol)
}

// scaledLoss is the summed pinball loss of beta on the (scaled) data.
func scaledLoss(x *mat.Dense, y, beta []float64, tau float64) float64 {
	n, p := x.Dims()
	s := 0.0
	for i := 0; i < n; i++ {
		q := 0.0
		for j := 0; j < p; j++ {
			q += x.At(i, j) * beta[j]
		}
		s += score.Pinball(q, y[i], tau)
	}
	return s
}

func dot(a, b []float64) float64 {
	s := 0.0
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}
