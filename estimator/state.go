package estimator

import (
	"fmt"
	"math"
	"sync"

	"gonum.org/v1/gonum/stat/distuv"
)

// MinRCond is the smallest reciprocal condition number (1-norm) of the
// diagonally scaled F, D^-1/2 F D^-1/2 with D = diag(F), at which a state
// still counts as fitted. F itself is badly scaled (its raw condition number
// is 1e7 and more for a quadratic trend); after scaling a well-spread design
// is well conditioned, so the scaled number is the one that tells a real
// near-singularity from bad units.
const MinRCond = 1e-10

// State is the sufficient statistics of one series under one Spec, updated
// recursively by the exact shifted form of discounted least squares:
//
//	on each new bucket:  F <- lambda L^-1 F L^-T,  h <- lambda L^-1 h,
//	                     T <- lambda T,            S <- lambda S
//	if it has a value Y: e = Y - f(1)^T theta_old,  q = f(0)^T F_pred^-1 f(0)
//	                     F <- F + f(0) f(0)^T,     h <- h + f(0) Y,
//	                     T <- T + 1,               S <- S + e^2 / (1 + q)
//	theta = F^-1 h
//
// F_pred is F after the shift and before the new term; q equals
// f(1)^T F_old^-1 f(1) / lambda. A bucket without a value applies the shift
// only. theta is in local coordinates relative to the newest bucket. The
// update allocates nothing; queries that return slices allocate them.
//
// L^-1 and f(0) are mostly zeros: L^-1 is block diagonal with a lower
// triangular polynomial block, a 2x2 rotation per harmonic pair and a 1x1
// block for a harmonic at period/2, and f(0) has ones for the constant and
// for each cosine and zeros elsewhere. The update keeps only their nonzero
// entries and skips the products with exact zeros. The values multiplied
// are finite, so a skipped term is an exact +-0 and each sum is the same
// float64, bit for bit, as the dense product gives (each sum starts from
// +0, and adding +-0 to a sum that is not -0 changes nothing).
//
// Component discounting. With a trend factor lambda_T and a seasonal factor
// lambda_S, D = diag(d_i) holds each regressor's block factor and the shift
// becomes
//
//	F_pred = D^1/2 L^-1 F L^-T D^1/2
//	h_pred = F_pred L^T theta_old = D^1/2 L^-1 F D^1/2 theta_old
//
// (D commutes with L, whose blocks are the components), then the new
// observation is added as above with q = f(0)^T F_pred^-1 f(0) =
// g^T F^-1 g, g = D^-1/2 f(1). In covariance form, with C = F^-1 the
// posterior and R the prior scale matrix of the state,
//
//	R = D^-1/2 G C G^T D^-1/2,  G = L^T,
//
// which is discount weighted estimation with a diagonal discount matrix
// (Ameen and Harrison, "Discount weighted estimation", Journal of
// Forecasting 3, 1984) and the multiple-discount form of component
// discounting of dynamic linear models (West and Harrison, Bayesian
// Forecasting and Dynamic Models, 2nd ed. 1997, ch. 6.3; their W_t inflates
// only the diagonal blocks of G C G^T, this form also the cross-covariances
// of trend and season, by 1/sqrt(lambda_T lambda_S)). The prior mean is the
// shifted estimate L^T theta_old, which is why h_pred is formed from theta
// and not by scaling h; with equal factors both give lambda L^-1 h. Before F
// is positive definite there is no theta and h_pred = D^1/2 L^-1 D^1/2 h
// (exact when F is block diagonal). References from memory.
//
// The residual scale: T and S are discounted by the larger factor,
// lambda_V = max(lambda_T, lambda_S): T <- lambda_V T + 1,
// S <- lambda_V S + e^2 / (1 + q). This is the variance discounting of West
// and Harrison (ch. 10.8, n_t = delta n_(t-1) + 1, d_t = delta d_(t-1) +
// S e^2 / Q) with delta = lambda_V: the observation noise is the most stable
// part of the model, so it keeps the longest of the memories; with equal
// factors it is lambda and the state is today's discounted least squares.
// With unequal factors S is no longer a weighted residual sum of squares of
// one fit but the sum of standardised one-step errors, which is what the
// intervals need. Only equal factors take the fast paths below.
//
// The two models with p = 2, the local linear trend (L^-1 = [[1, 0],
// [-1, 1]]) and a level with a period-2 cosine (L^-1 = diag(1, -1)), run
// the same arithmetic through unrolled 2 x 2 kernels (shift2, mulVec2,
// cholesky2, forwardSubst2, cholSolve2): at p = 2 the loops of the general
// kernels would cost more than their arithmetic.
type State struct {
	spec   Spec
	p      int
	lambda float64 // the factor of T, S and the error sums: Spec.VarianceFactor

	// Component discounting (Spec.SeasonLambda differs from Lambda): dhalf
	// holds D^1/2, the square root of each regressor's block factor; g is
	// D^-1/2 f(1).
	comp  bool
	dhalf []float64
	g     []float64

	f0, f1 []float64  // f(0), f(1)
	f0nz   []int      // indices i with f0[i] != 0, increasing
	linv   sparseRows // L^-1
	// unrolled: p = 2, and linv2 = L^-1 (row-major) has only the entries
	// 0 and +-1, so every product in shift2 and mulVec2 is exact and their
	// sums agree with the general kernels' even where the compiler fuses a
	// multiply and an add. Skip shifts by L^-k with the general kernels.
	unrolled bool
	linv2    [4]float64
	f        []float64 // F, symmetric, full row-major p x p
	h        []float64
	chol     []float64 // lower Cholesky factor C of F when pd, 1/C_ii on the diagonal
	theta    []float64
	tmp      []float64 // p x p scratch
	hnew     []float64 // p scratch
	vec      []float64 // p scratch

	pd    bool    // chol and theta are valid
	rcond float64 // reciprocal 1-norm condition number of scaled F, as last computed
	// rcondAge counts the updates since rcond was computed (0: compute now).
	// A comfortably conditioned F (rcond >= rcondSafe) is re-checked every
	// rcondEvery updates, not on every one: see refactor.
	rcondAge int

	t float64 // discounted count of observations, sum lambda^j
	s float64 // discounted residual sum of squares of the current fit
	// te and t2 are the discounted count of the terms e^2 / (1 + q) in S
	// and the discounted sum of their squared weights (lambda^2 per
	// bucket): the scale of the intervals is S / te with the effective
	// number te^2 / t2 of those terms as degrees of freedom (see Sigma).
	te, t2 float64
	syy    float64 // discounted sum of Y^2, only to start S when F first becomes pd

	n     int64 // observations folded in
	steps int64 // buckets advanced, observed or skipped

	errs errorSums
	tq   quantileCache
	// pointOnly: Observe leaves the one-step interval out of its Step (no
	// SE, no coverage), for model choice, which scores point errors only.
	pointOnly bool
}

// errorSums accumulates one-step prediction errors e = Y - forecast, scored only
// for observations that arrive while the state is Ready.
type errorSums struct {
	n       int64   // scored errors
	sumAbs  float64 // sum |e|
	sumSq   float64 // sum e^2
	sumErr  float64 // sum e
	nAPE    int64   // scored errors with Y != 0
	sumAPE  float64 // sum |e / Y| over those
	nInt    int64   // scored errors with an interval (T - p > 0)
	in80    int64   // actuals inside the 80 % interval issued one step earlier
	in95    int64   // same, 95 %
	dAbs    float64 // discounted sum |e|
	dSq     float64 // discounted sum e^2
	dWeight float64 // discounted count of scored errors
}

// quantileCache keeps the Student t quantiles for the degrees of freedom of
// the last steps: in steady state T stops changing (or alternates between
// two neighbouring floats) and the quantiles are free.
type quantileCache struct {
	slot       [2]quantiles
	next       int     // slot to fill next
	last, prev float64 // df of the two previous scored steps
}

type quantiles struct {
	df, t80, t95 float64 // valid when t80 != 0
}

// score decides whether the actual fell inside the 80 % and 95 % intervals
// of the one-step forecast, |e| <= t_q(df) SE. Once df repeats the cached
// quantiles answer. While df still changes (T grows towards 1/(1 - lambda))
// one evaluation of the t distribution function P(|t| <= |e|/SE) answers
// both, and the quantile (an inverse incomplete beta, some thirty times
// dearer) is computed only for an actual outside the 95 % interval, whose
// bounds a surprise reports.
func (st *State) score(step *Step, e, df float64) {
	c := &st.tq
	for _, q := range c.slot {
		if q.t80 != 0 && q.df == df {
			step.Lower95, step.Upper95 = step.Forecast-q.t95*step.SE, step.Forecast+q.t95*step.SE
			step.In80, step.In95 = math.Abs(e) <= q.t80*step.SE, math.Abs(e) <= q.t95*step.SE
			return
		}
	}
	if df == c.last || df == c.prev {
		// A df seen within the last two steps: T has settled; cache it.
		if t80, t95 := studentQuantiles(df); finite(t80) {
			c.slot[c.next] = quantiles{df: df, t80: t80, t95: t95}
			c.next = 1 - c.next
			st.score(step, e, df)
			return
		}
	}
	c.prev, c.last = c.last, df
	if step.SE == 0 {
		step.In80, step.In95 = e == 0, e == 0
	} else {
		d := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: df}
		cdf := d.CDF(math.Abs(e) / step.SE)
		step.In80, step.In95 = cdf <= 0.9, cdf <= 0.975
	}
	if !step.In95 {
		if _, t95 := studentQuantiles(df); finite(t95) {
			step.Lower95, step.Upper95 = step.Forecast-t95*step.SE, step.Forecast+t95*step.SE
		}
	}
}

// studentQuantiles returns the two-sided 80 % and 95 % critical values of
// Student's t with df degrees of freedom (df may be fractional). Below about
// df = 0.0065 the 95 % value overflows; then there is no interval and both
// are NaN.
func studentQuantiles(df float64) (t80, t95 float64) {
	if q, ok := sharedQuantiles.get(df); ok {
		return q.t80, q.t95
	}
	t80, t95 = computeQuantiles(df)
	sharedQuantiles.put(quantiles{df: df, t80: t80, t95: t95})
	return t80, t95
}

// sharedQuantiles remembers quantiles across states: every series of a
// tracker in steady state has the same T (the fixed point of T = lambda T + 1
// in float64), so a sidecar that decodes thousands of states per batch
// computes each quantile once. Bounded; safe for concurrent use.
var sharedQuantiles = &quantileMemo{m: map[float64]quantiles{}}

type quantileMemo struct {
	mu sync.Mutex
	m  map[float64]quantiles
}

func (q *quantileMemo) get(df float64) (quantiles, bool) {
	q.mu.Lock()
	defer q.mu.Unlock()
	v, ok := q.m[df]
	return v, ok
}

func (q *quantileMemo) put(v quantiles) {
	q.mu.Lock()
	defer q.mu.Unlock()
	if len(q.m) >= 4096 {
		clear(q.m) // plenty for steady states; replays of short series churn
	}
	q.m[v.df] = v
}

func computeQuantiles(df float64) (t80, t95 float64) {
	d := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: df}
	t80, t95 = d.Quantile(0.9), d.Quantile(0.975)
	if !finite(t80) || !finite(t95) {
		return math.NaN(), math.NaN()
	}
	return t80, t95
}

// NewState returns an empty state (F = 0, h = 0) for a valid spec.
func NewState(spec Spec) (*State, error) {
	if err := spec.Validate(); err != nil {
		return nil, err
	}
	p := spec.Params()
	// L^-1 has at most (d+1)(d+2)/2 nonzeros in its polynomial block, 4 in
	// each harmonic pair and 1 for a cosine at period/2. One allocation
	// holds the floats and one the indices (a sidecar decodes thousands of
	// states per batch).
	nnz := (spec.Degree + 1) * (spec.Degree + 2) / 2
	for k := 1; k <= spec.Harmonics; k++ {
		if spec.nyquist(k) {
			nnz++
		} else {
			nnz += 4
		}
	}
	buf := make([]float64, 6*p+3*p*p+nnz)
	take := func(n int) []float64 {
		s := buf[:n:n]
		buf = buf[n:]
		return s
	}
	spec = spec.Canonical()
	st := &State{spec: spec, p: p, lambda: spec.VarianceFactor(), comp: spec.componentDiscount()}
	st.f0, st.f1, st.h, st.theta, st.hnew, st.vec = take(p), take(p), take(p), take(p), take(p), take(p)
	st.f, st.chol, st.tmp = take(p*p), take(p*p), take(p*p)
	spec.Regressors(0, st.f0)
	spec.Regressors(1, st.f1)
	nf0 := nonzeros(st.f0)
	ints := make([]int, nf0+p+1+nnz)
	st.f0nz = ints[:0:nf0]
	for i, x := range st.f0 {
		if x != 0 {
			st.f0nz = append(st.f0nz, i)
		}
	}
	ints = ints[nf0:]
	linv := spec.Shift(-1, st.tmp) // tmp is scratch: linv keeps a copy
	st.linv = newSparseRows(linv, p, ints[:0:p+1], ints[p+1:p+1], take(nnz)[:0])
	if st.comp {
		st.initComponent()
	}
	if p == 2 {
		st.unrolled = true
		for i, x := range linv {
			st.linv2[i] = x
			st.unrolled = st.unrolled && (x == 0 || x == 1 || x == -1)
		}
	}
	return st, nil
}

// componentNow reports whether the next shift discounts by components: the
// factors differ and the state is fitted (F positive definite and well
// conditioned). Until then the state is discounted least squares with the
// one factor lambda_V, which keeps h in the range of F (a weighted least
// squares problem), so that the first theta is a fit and not the
// amplified rounding of an inconsistent system; component discounting
// needs that theta (componentH).
func (st *State) componentNow() bool {
	return st.comp && st.pd && st.rcond >= MinRCond
}

// initComponent sets up the arrays of component discounting. Tests call it
// on a state with equal factors to run that path against the plain one.
func (st *State) initComponent() {
	p, spec := st.p, st.spec
	st.comp = true
	st.dhalf, st.g = make([]float64, p), make([]float64, p)
	for i := range st.dhalf {
		st.dhalf[i] = math.Sqrt(spec.SeasonFactor())
		if i <= spec.Degree {
			st.dhalf[i] = math.Sqrt(spec.Lambda)
		}
		st.g[i] = st.f1[i] / st.dhalf[i]
	}
}

// shiftComponents applies the shift of component discounting over k
// buckets (see State) with a = L^-k:
//
//	F_pred = D^k/2 a F a^T D^k/2
//	h_pred = D^k/2 a F D^k/2 theta = D^k/2 a (dT h + (dS - dT) F P_S theta)
//
// where D^k/2 = dT I + (dS - dT) P_S, dT = lambda_T^(k/2), dS =
// lambda_S^(k/2), and P_S projects on the seasonal block. It is computed as
// lambda_T^k a F a^T with the seasonal block of rows and columns scaled by
// rho = (lambda_S / lambda_T)^(k/2), and lambda_T^k a h likewise, plus the
// term in dS - dT: with equal factors rho is exactly 1 and the second term
// exactly 0, so the arithmetic is the plain recursion's. The term formed
// from theta (whose rounding grows with the condition number of F) enters
// only through the difference of the factors. Without theta (F not yet
// positive definite) F P_S theta is replaced by P_S h. componentH sets hnew
// (F unchanged, tmp[:p] used); componentF then shifts F.
func (st *State) componentH(a sparseRows, k int) {
	p, s0 := st.p, st.spec.Degree+1
	wT, dT, dS, rho := st.componentWeights(k)
	// x = (dS - dT) F P_S theta, or (dS - dT) P_S h without theta.
	x := st.tmp[:p]
	for i := range x {
		switch {
		case st.pd:
			x[i] = dot(st.f[i*p+s0:i*p+p], st.theta[s0:p])
		case i >= s0:
			x[i] = st.h[i]
		default:
			x[i] = 0
		}
		x[i] *= dS - dT
	}
	// hnew = lambda_T^k a h with seasonal rows times rho, plus D^k/2 a x.
	a.mulVec(st.h, st.hnew)
	for i := range st.hnew {
		st.hnew[i] *= wT
		if i >= s0 {
			st.hnew[i] *= rho
		}
	}
	for i := range st.hnew {
		lo, hi := a.start[i], a.start[i+1]
		var sum float64
		for j, c := range a.col[lo:hi] {
			sum += a.val[lo+j] * x[c]
		}
		d := dT
		if i >= s0 {
			d = dS
		}
		st.hnew[i] += d * sum
	}
}

// componentWeights returns lambda_T^k, lambda_T^(k/2), lambda_S^(k/2) and
// (lambda_S / lambda_T)^(k/2).
func (st *State) componentWeights(k int) (wT, dT, dS, rho float64) {
	lt, ls := st.spec.Lambda, st.spec.SeasonFactor()
	if k == 1 {
		return lt, st.dhalf[0], st.dhalf[st.p-1], math.Sqrt(ls / lt)
	}
	half := float64(k) / 2
	return math.Pow(lt, float64(k)), math.Pow(lt, half), math.Pow(ls, half), math.Pow(ls/lt, half)
}

// componentF sets F <- D^k/2 a F a^T D^k/2 (see componentH).
func (st *State) componentF(a sparseRows, k int) {
	p, s0 := st.p, st.spec.Degree+1
	wT, _, _, rho := st.componentWeights(k)
	st.shiftF(a, wT)
	for i := 0; i < p; i++ {
		for j := 0; j < p; j++ {
			if i >= s0 {
				st.f[i*p+j] *= rho
			}
			if j >= s0 {
				st.f[i*p+j] *= rho
			}
		}
	}
}

// sparseRows is a p x p matrix kept by its nonzero entries, row by row in
// increasing column order: row i has the value val[k] in column col[k] for
// start[i] <= k < start[i+1].
type sparseRows struct {
	start []int // p + 1 offsets
	col   []int
	val   []float64
}

// newSparseRows keeps the entries of the row-major p x p matrix a that are
// not exactly zero. It appends to start, col and val, which may be nil;
// with room for p + 1, nonzeros(a) and nonzeros(a) entries it allocates
// nothing. a may be scratch: the entries are copied.
func newSparseRows(a []float64, p int, start, col []int, val []float64) sparseRows {
	m := sparseRows{start: append(start, 0), col: col, val: val}
	for i := 0; i < p; i++ {
		for k := 0; k < p; k++ {
			if v := a[i*p+k]; v != 0 {
				m.col = append(m.col, k)
				m.val = append(m.val, v)
			}
		}
		m.start = append(m.start, len(m.col))
	}
	return m
}

// nonzeros counts the entries of xs that are not exactly zero.
func nonzeros(xs []float64) int {
	n := 0
	for _, x := range xs {
		if x != 0 {
			n++
		}
	}
	return n
}

// mulVec sets dst = m x, the sums in increasing column order like a dense
// product.
func (m sparseRows) mulVec(x, dst []float64) {
	for i := range dst {
		lo, hi := m.start[i], m.start[i+1]
		cols, vals := m.col[lo:hi], m.val[lo:hi]
		var sum float64
		for k, c := range cols {
			sum += vals[k] * x[c]
		}
		dst[i] = sum
	}
}

// Spec returns the model the state was built for.
func (st *State) Spec() Spec { return st.spec }

// Params is the number of regressors p.
func (st *State) Params() int { return st.p }

// Count is the number of observations folded in.
func (st *State) Count() int64 { return st.n }

// Steps is the number of buckets advanced, observed or skipped.
func (st *State) Steps() int64 { return st.steps }

// Weight is T = sum_j lambda^j over the observed buckets.
func (st *State) Weight() float64 { return st.t }

// RSS is S, the discounted residual sum of squares of the current fit,
// sum_j lambda^j (Y_{N-j} - f(-j)^T theta_N)^2.
func (st *State) RSS() float64 { return st.s }

// RCond is the reciprocal 1-norm condition number of the diagonally scaled F,
// 0 while F is singular.
func (st *State) RCond() float64 {
	if !st.pd {
		return 0
	}
	return st.scaledRCond()
}

// rcondSafe and rcondEvery bound how stale the condition number behind
// Ready may be. An update with a value turns F into lambda L^-1 F L^-T plus
// a positive rank-one term: the scaled conditioning moves by modest factors
// per step, and a state 10^4 times above MinRCond is re-checked within 16
// updates (a judgement, not a proven bound; a skip, which can change F a lot,
// and a decode always recompute it, and so does any state below rcondSafe).
// The check costs p solves with the Cholesky factor: about two thirds of an
// update at p = 2 and about one whole update at p = 6 (BenchmarkRCond
// beside BenchmarkObserve). RCond always computes the current value.
const (
	rcondSafe  = 1e-6
	rcondEvery = 16
)

// Ready reports whether the state gives estimates: at least p + BurnIn
// observations and a well-conditioned F (scaled reciprocal condition number
// at least MinRCond).
func (st *State) Ready() bool {
	return st.pd && st.n >= int64(st.p+st.spec.BurnIn) && st.rcond >= MinRCond
}

// Sigma is the scale of the forecast errors, the square root of the
// discounted mean square of the standardised one-step prediction errors
//
//	sigma^2 = S / Te,  S = sum_j lambda_V^j e_j^2 / (1 + q_j),  Te = sum_j lambda_V^j
//
// over the errors that entered S (Te counts them, with the state's weights;
// a restart of S from its definition, before the first fit, counts as
// T - p of them). One-step errors are predictions, not residuals of the
// fit they came from, so no parameters are subtracted: unlike the
// least-squares S / (T - p) (LSSigma), this stays defined and sound where
// a short memory 1/(1 - lambda) comes close to p, the setting a lambda
// search often lands on. NaN before the first error.
func (st *State) Sigma() float64 {
	if !(st.te > 0) {
		return math.NaN()
	}
	v := math.Sqrt(st.s / st.te)
	if math.IsInf(v, 1) {
		// S near the largest float64 over a small Te overflows where the
		// square roots stay finite (found by the fuzzer for the
		// least-squares form: S = 9.3e306, T - p = 0.0085).
		v = math.Sqrt(st.s) / math.Sqrt(st.te)
	}
	return v
}

// DF is the effective number of one-step errors behind Sigma,
// Te^2 / sum_j lambda_V^2j (Kish's effective sample size of a weighted mean;
// the degrees of freedom of Satterthwaite's approximation to a weighted sum
// of chi-squares): about (1 + lambda_V) / (1 - lambda_V) in steady state.
// Intervals use Student's t with these degrees of freedom; 0 before the
// first error.
func (st *State) DF() float64 {
	if !(st.te > 0) || !(st.t2 > 0) {
		return 0
	}
	return st.te * st.te / st.t2
}

// LSDF is the residual degrees of freedom of discounted least squares,
// T - p.
func (st *State) LSDF() float64 { return st.t - float64(st.p) }

// LSSigma is the residual standard deviation of discounted least squares,
// sqrt(S / (T - p)), NaN while T <= p. With one factor S is the discounted
// residual sum of squares of the current fit.
func (st *State) LSSigma() float64 {
	df := st.LSDF()
	if df <= 0 {
		return math.NaN()
	}
	return math.Sqrt(st.s) / math.Sqrt(df)
}

// Step tells what one observation did: whether it was scored against the
// forecast issued one bucket earlier and, if so, that forecast and its error.
type Step struct {
	Scored   bool    // the state was Ready before the observation
	Forecast float64 // f(1)^T theta_old, the one-step forecast
	Err      float64 // Y - Forecast
	SE       float64 // standard error of the one-step forecast, NaN before the first error
	DF       float64 // degrees of freedom of its interval (State.DF before the observation)
	// Lower95, Upper95 is the 95 % interval issued one step earlier. It is always
	// filled when Y fell outside it; while T is still changing (the first
	// few hundred steps) it may be NaN for a Y inside it: In80 and In95 are
	// then decided from the t distribution function (see score).
	Lower95 float64
	Upper95 float64
	In80    bool // Y inside the 80 % interval (false when there was none)
	In95    bool
}

// Observe advances the state by one bucket that has the value y. NaN, Inf or
// a value whose square overflows is an error and leaves the state unchanged.
func (st *State) Observe(y float64) (Step, error) {
	var step Step
	if math.IsNaN(y) || math.IsInf(y, 0) {
		return step, fmt.Errorf("estimator: value %v is not a finite number", y)
	}
	p, lam := st.p, st.lambda

	// Score the one-step forecast of the old state.
	ready := st.Ready()
	// q = f(0)^T F_pred^-1 f(0).
	var e, q float64
	comp := st.componentNow()
	if st.pd {
		step.Forecast = dot(st.f1, st.theta)
		e = y - step.Forecast
		if comp {
			q = st.quadForm(st.g)
		} else {
			q = st.quadForm(st.f1) / lam
		}
	}
	if ready {
		step.Scored, step.Err = true, e
		step.SE, step.Lower95, step.Upper95 = math.NaN(), math.NaN(), math.NaN()
		if df := st.DF(); df > 0 && !st.pointOnly {
			step.DF = df
			// Var(Y - forecast) = sigma^2 (1 + q), q = f(0)^T F_pred^-1 f(0)
			// (the variance factor of the one-step prediction; see Forecast).
			step.SE = st.Sigma() * math.Sqrt(1+q)
			st.score(&step, e, df)
		}
	}

	// Work out everything that depends on y before touching the state, so
	// that an overflow leaves it as it was.
	switch {
	case comp:
		st.componentH(st.linv, 1)
	case st.unrolled:
		mulVec2(&st.linv2, st.h, st.hnew)
	default:
		st.linv.mulVec(st.h, st.hnew)
	}
	if !comp {
		for i := range st.hnew {
			st.hnew[i] *= lam
		}
	}
	for _, i := range st.f0nz {
		st.hnew[i] += st.f0[i] * y
	}
	syy := lam*st.syy + y*y
	s := lam * st.s
	if st.pd {
		s += e * e / (1 + q)
	}
	// x - x is 0 for a finite x and NaN for NaN or +-Inf: one sum and one
	// comparison check them all.
	nonFinite := (syy - syy) + (s - s)
	for _, x := range st.hnew {
		nonFinite += x - x
	}
	// The error sums come last: add changes them only when all its sums
	// stay finite, and nothing after it can fail.
	if nonFinite != 0 || step.Scored && !st.errs.add(y, e, step, lam) {
		return Step{}, fmt.Errorf("estimator: value %v is too large to fold in without overflow", y)
	}
	if !step.Scored {
		st.errs.decay(lam)
	}

	switch {
	case comp:
		st.componentF(st.linv, 1)
	case st.unrolled:
		shift2(&st.linv2, st.f, lam)
	default:
		st.shiftF(st.linv, lam)
	}
	for _, i := range st.f0nz {
		for _, j := range st.f0nz {
			st.f[i*p+j] += st.f0[i] * st.f0[j]
		}
	}
	st.h, st.hnew = st.hnew, st.h
	st.t = lam*st.t + 1
	st.syy = syy
	// The recursion for S needs a previous fit that is good to working
	// precision: e and q from an F whose scaled condition number is beyond
	// 1/MinRCond carry errors that S keeps, for good at lambda = 1 (S was 1 %
	// off after 16 weeks of a quadratic trend with yearly harmonics). Until
	// the state is fitted, S comes from its definition.
	wasFitted := st.pd && st.rcond >= MinRCond
	st.refactor()
	switch {
	case st.pd && wasFitted:
		st.s = s
		st.te, st.t2 = lam*st.te+1, lam*lam*st.t2+1
	case st.pd:
		// F is positive definite but was not well conditioned one step
		// earlier: start (or restart) S from its definition,
		// S = syy - h^T F^-1 h, with h^T F^-1 h = ||C^-1 h||^2 (a sum of
		// squares: at worst +Inf for huge values, never NaN). It holds
		// T - p degrees of freedom, counted as that many unit terms.
		st.s = math.Max(0, st.syy-st.quadForm(st.h))
		st.te = math.Max(0, st.t-float64(st.p))
		st.t2 = st.te
	default:
		st.s, st.te, st.t2 = 0, 0, 0
	}
	st.n++
	st.steps++
	return step, nil
}

// add scores one error. It reports false, and changes nothing, when a sum
// would overflow (an encoding of the state can hold only finite sums).
func (es *errorSums) add(y, e float64, step Step, lam float64) bool {
	ae := math.Abs(e)
	sumAbs, sumSq, sumErr := es.sumAbs+ae, es.sumSq+e*e, es.sumErr+e
	dAbs, dSq, dWeight := lam*es.dAbs+ae, lam*es.dSq+e*e, lam*es.dWeight+1
	// x - x is 0 for a finite x, NaN otherwise (see Observe). sumAPE needs
	// no check: an actual so close to 0 that |e / Y| overflows has no
	// percentage error, like Y = 0 itself.
	if (sumAbs-sumAbs)+(sumSq-sumSq)+(sumErr-sumErr)+(dAbs-dAbs)+(dSq-dSq)+(dWeight-dWeight) != 0 {
		return false
	}
	es.n++
	es.sumAbs, es.sumSq, es.sumErr = sumAbs, sumSq, sumErr
	es.dAbs, es.dSq, es.dWeight = dAbs, dSq, dWeight
	if ape := math.Abs(e / y); y != 0 && finite(es.sumAPE+ape) {
		es.nAPE++
		es.sumAPE += ape
	}
	if !math.IsNaN(step.SE) {
		es.nInt++
		if step.In80 {
			es.in80++
		}
		if step.In95 {
			es.in95++
		}
	}
	return true
}

func (es *errorSums) decay(w float64) {
	es.dAbs *= w
	es.dSq *= w
	es.dWeight *= w
}

// Skip advances the state by k >= 1 buckets that have no value (a gap):
//
//	F <- lambda^k L^-k F L^-kT,  h <- lambda^k L^-k h,  T, S <- lambda^k T, S
//
// (with component discounting D^k/2 L^-k F L^-kT D^k/2 and the h of
// componentH, T and S by lambda_V^k),
// after which theta_new = (L^T)^k theta_old.
func (st *State) Skip(k int) error {
	if k < 0 {
		return fmt.Errorf("estimator: cannot skip %d buckets: the count must not be negative", k)
	}
	if k == 0 {
		return nil
	}
	if int64(k) > math.MaxInt64-st.steps {
		return fmt.Errorf("estimator: cannot skip %d buckets: the bucket count would overflow", k)
	}
	w := math.Pow(st.lambda, float64(k))
	lk := st.tmpShift(k)
	if st.componentNow() {
		// F <- D^k/2 L^-k F L^-kT D^k/2, h <- F_pred (L^T)^k theta. The
		// product F theta can overflow where F h could not (found by the
		// fuzzer: values near 1e300): then nothing changes.
		st.componentH(lk, k)
		var nonFinite float64
		for _, x := range st.hnew {
			nonFinite += x - x
		}
		if nonFinite != 0 {
			return fmt.Errorf("estimator: cannot skip %d buckets: the shifted state overflows (values too large)", k)
		}
		st.componentF(lk, k)
	} else {
		lk.mulVec(st.h, st.hnew)
		for i := range st.hnew {
			st.hnew[i] *= w
		}
		st.shiftF(lk, w)
	}
	st.h, st.hnew = st.hnew, st.h
	st.t *= w
	st.s *= w
	st.te *= w
	st.t2 *= w * w
	st.syy *= w
	st.errs.decay(w)
	st.steps += int64(k)
	st.rcondAge = 0 // a gap can change the conditioning a lot: check it now
	st.refactor()
	if !st.pd {
		st.s, st.te, st.t2 = 0, 0, 0
	}
	return nil
}

// tmpShift returns L^-k, freshly allocated unless k = 1 (Skip is not on the
// hot path).
func (st *State) tmpShift(k int) sparseRows {
	if k == 1 {
		return st.linv
	}
	return newSparseRows(st.spec.Shift(float64(-k), make([]float64, st.p*st.p)), st.p, nil, nil, nil)
}

// shiftF sets F <- w A F A^T, skipping the zeros of A (see State).
//
// F is positive semidefinite and so is w A F A^T, whose diagonal entries
// are sums of squares in exact arithmetic; rounding can leave one a tiny
// negative number all the same (found by the fuzzer: a value of 1.4e-76 and
// a gap of 16,946 buckets left -1e-241 on a sine term), which no valid state
// holds and the decoder rejects. Both shift kernels set such an entry to 0.
func (st *State) shiftF(a sparseRows, w float64) {
	p := st.p
	f, tmp := st.f[:p*p], st.tmp[:p*p]
	// tmp = A F
	for i := 0; i < p; i++ {
		lo, hi := a.start[i], a.start[i+1]
		cols, vals := a.col[lo:hi], a.val[lo:hi]
		row := tmp[i*p : i*p+p]
		for j := range row {
			var sum float64
			for k, c := range cols {
				sum += vals[k] * f[c*p+j]
			}
			row[j] = sum
		}
	}
	// F = w tmp A^T, symmetric by construction: compute the lower half and mirror.
	for j := 0; j < p; j++ {
		lo, hi := a.start[j], a.start[j+1]
		cols, vals := a.col[lo:hi], a.val[lo:hi]
		for i := j; i < p; i++ {
			row := tmp[i*p : i*p+p]
			var sum float64
			for k, c := range cols {
				sum += row[c] * vals[k]
			}
			v := w * sum
			if i == j && v < 0 {
				v = 0
			}
			f[i*p+j] = v
			f[j*p+i] = v
		}
	}
}

// refactor recomputes the Cholesky factor of F, theta = F^-1 h and the scaled
// reciprocal condition number. It is the only place those are computed, so a
// decoded state has bit-for-bit the same derived values as the one encoded.
func (st *State) refactor() {
	st.pd = st.cholesky()
	if !st.pd {
		for i := range st.theta {
			st.theta[i] = 0
		}
		st.rcond, st.rcondAge = 0, 0
		return
	}
	st.cholSolve(st.h, st.theta)
	if st.rcondAge > 0 && st.rcondAge < rcondEvery && st.rcond >= rcondSafe {
		st.rcondAge++
		return
	}
	st.rcond, st.rcondAge = st.scaledRCond(), 1
}

// quadForm returns x^T F^-1 x = ||C^-1 x||^2 with F = C C^T (F must be pd).
func (st *State) quadForm(x []float64) float64 {
	st.forwardSubst(x, st.vec)
	return dot(st.vec, st.vec)
}

// scaledRCond computes 1 / (||A||_1 ||A^-1||_1) for A = D^-1/2 F D^-1/2 from
// the Cholesky factor of F: A^-1 = D^1/2 F^-1 D^1/2, formed one column at a
// time without an explicit inverse of F being kept.
func (st *State) scaledRCond() float64 {
	p := st.p
	d := st.tmp[:p] // D^1/2 (tmp is free outside shiftF)
	for i := range d {
		d[i] = math.Sqrt(st.f[i*p+i])
	}
	var normA, normInv float64
	for j, dj := range d {
		var col float64
		for i, di := range d {
			col += math.Abs(st.f[i*p+j]) / (di * dj)
		}
		normA = math.Max(normA, col)
		for i := range st.vec {
			st.vec[i] = 0
		}
		st.vec[j] = dj
		st.cholSolve(st.vec, st.vec)
		col = 0
		for i, di := range d {
			col += math.Abs(st.vec[i] * di)
		}
		normInv = math.Max(normInv, col)
	}
	r := 1 / (normA * normInv)
	if !finite(r) {
		return 0
	}
	return r
}

// Theta returns a copy of theta_N = F^-1 h, or ErrNotReady.
func (st *State) Theta() ([]float64, error) {
	if !st.Ready() {
		return nil, ErrNotReady
	}
	return append([]float64(nil), st.theta...), nil
}

// Clone returns an independent copy of the state.
func (st *State) Clone() *State {
	c, err := NewState(st.spec)
	if err != nil {
		panic("estimator: clone of a state with an invalid spec")
	}
	copy(c.f, st.f)
	copy(c.h, st.h)
	copy(c.chol, st.chol)
	copy(c.theta, st.theta)
	c.pd, c.rcond, c.rcondAge = st.pd, st.rcond, st.rcondAge
	c.t, c.s, c.syy, c.n, c.steps = st.t, st.s, st.syy, st.n, st.steps
	c.te, c.t2 = st.te, st.t2
	c.errs, c.tq = st.errs, st.tq
	return c
}

// cholesky factors F into chol (see the function cholesky).
func (st *State) cholesky() bool {
	if st.unrolled {
		return cholesky2(st.f, st.chol)
	}
	return cholesky(st.f, st.chol, st.p)
}

// forwardSubst solves C x = b with the factor in chol.
func (st *State) forwardSubst(b, x []float64) {
	if st.unrolled {
		forwardSubst2(st.chol, b, x)
		return
	}
	forwardSubst(st.chol, b, x, st.p)
}

// cholSolve solves F x = b with the factor in chol.
func (st *State) cholSolve(b, x []float64) {
	if st.unrolled {
		cholSolve2(st.chol, b, x)
		return
	}
	cholSolve(st.chol, b, x, st.p)
}

// cholesky factors the symmetric p x p matrix a = C C^T into the lower
// triangle of c, with 1 / C_jj in place of each diagonal entry C_jj, so
// that the triangular solves multiply instead of divide. It reports false
// when a is not numerically positive definite: a pivot that is not positive
// or below 1e-13 of its diagonal entry (the rounding left over from a
// singular F); the lower triangle of c is then partly written and means
// nothing. The strict upper triangle of c is neither written nor read: it
// stays as the caller made it (zero in a State).
func cholesky(a, c []float64, p int) bool {
	a, c = a[:p*p], c[:p*p]
	for j := 0; j < p; j++ {
		cj := c[j*p : j*p+j]
		d := a[j*p+j]
		for _, x := range cj {
			d -= x * x
		}
		if !(d > 1e-13*a[j*p+j]) || !finite(d) {
			return false
		}
		r := 1 / math.Sqrt(d)
		c[j*p+j] = r
		for i := j + 1; i < p; i++ {
			ci := c[i*p : i*p+j]
			v := a[i*p+j]
			for k, x := range cj {
				v -= ci[k] * x
			}
			c[i*p+j] = v * r
		}
	}
	return true
}

// forwardSubst solves C x = b for the lower-triangular C that cholesky left
// in c (reciprocal diagonal); x may be b itself.
func forwardSubst(c, b, x []float64, p int) {
	c, b, x = c[:p*p], b[:p], x[:p]
	for i := range x {
		ci := c[i*p : i*p+i+1]
		v := b[i]
		for k, cik := range ci[:i] {
			v -= cik * x[k]
		}
		x[i] = v * ci[i]
	}
}

// cholSolve solves (C C^T) x = b; x may be b itself.
func cholSolve(c, b, x []float64, p int) {
	forwardSubst(c, b, x, p)
	c, x = c[:p*p], x[:p]
	for i := p - 1; i >= 0; i-- {
		v := x[i]
		for k := i + 1; k < p; k++ {
			v -= c[k*p+i] * x[k]
		}
		x[i] = v * c[i*p+i]
	}
}

// The unrolled kernels for p = 2 below do the floating-point operations of
// the general ones above in the same order; shift2 and mulVec2 also multiply
// by the zeros of a, which leaves the same values as skipping them (up to
// the sign of a zero).

// shift2 sets f <- w a f a^T for 2 x 2 row-major a and f (see shiftF).
func shift2(a *[4]float64, f []float64, w float64) {
	f = f[:4]
	a00, a01, a10, a11 := a[0], a[1], a[2], a[3]
	f00, f01, f10, f11 := f[0], f[1], f[2], f[3]
	// tmp = a f
	t00, t01 := a00*f00+a01*f10, a00*f01+a01*f11
	t10, t11 := a10*f00+a11*f10, a10*f01+a11*f11
	// f = w tmp a^T: the lower half, mirrored.
	n00 := w * (t00*a00 + t01*a01)
	n10 := w * (t10*a00 + t11*a01)
	n11 := w * (t10*a10 + t11*a11)
	if n00 < 0 {
		n00 = 0 // a rounding-negative diagonal, see shiftF
	}
	if n11 < 0 {
		n11 = 0
	}
	f[0], f[1], f[2], f[3] = n00, n10, n10, n11
}

// mulVec2 sets dst = a x for 2 x 2 row-major a (see sparseRows.mulVec).
func mulVec2(a *[4]float64, x, dst []float64) {
	x, dst = x[:2], dst[:2]
	x0, x1 := x[0], x[1]
	dst[0], dst[1] = a[0]*x0+a[1]*x1, a[2]*x0+a[3]*x1
}

// cholesky2 is cholesky for p = 2.
func cholesky2(a, c []float64) bool {
	a, c = a[:4], c[:4]
	d := a[0]
	if !(d > 1e-13*a[0]) || !finite(d) {
		return false
	}
	r := 1 / math.Sqrt(d)
	c[0] = r
	c10 := a[2] * r
	c[2] = c10
	d = a[3] - c10*c10
	if !(d > 1e-13*a[3]) || !finite(d) {
		return false
	}
	c[3] = 1 / math.Sqrt(d)
	return true
}

// forwardSubst2 is forwardSubst for p = 2.
func forwardSubst2(c, b, x []float64) {
	c, b, x = c[:4], b[:2], x[:2]
	x0 := b[0] * c[0]
	x[0], x[1] = x0, (b[1]-c[2]*x0)*c[3]
}

// cholSolve2 is cholSolve for p = 2.
func cholSolve2(c, b, x []float64) {
	forwardSubst2(c, b, x)
	c, x = c[:4], x[:2]
	x1 := x[1] * c[3]
	x[0], x[1] = (x[0]-c[2]*x1)*c[0], x1
}

func dot(a, b []float64) float64 {
	var s float64
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}

func finite(x float64) bool { return x-x == 0 }

func allFinite(xs []float64) bool {
	for _, x := range xs {
		if !finite(x) {
			return false
		}
	}
	return true
}
