// Package qr holds linear quantile regression for plumb's forecaster
// (METHODS.md section 3): Fit, an exact solver of the linear programme for a
// batch of data, and Online, a learner updated one settled outcome at a time
// with a scale-free subgradient step.
//
// Both minimise the pinball loss rho_tau(q, y) = (1{y < q} - tau)(q - y) of a
// linear predictor q = x' beta; the caller builds the feature vector x and
// includes a constant 1 if it wants an intercept.
package qr
