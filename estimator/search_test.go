package estimator

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"
)

// localLevel draws the local level model (random walk plus noise,
// Harvey, Forecasting, Structural Time Series Models and the Kalman Filter,
// 1989, section 2.3.1): mu_t = mu_{t-1} + eta_t, y_t = mu_t + eps_t with
// Var(eta)/Var(eps) = q. A tenth of the buckets have no value. The scenario
// is invented (a shop's daily footfall).
func localLevel(rng *rand.Rand, n int, q float64) []float64 {
	ys := make([]float64, n)
	mu := 500.0
	for i := range ys {
		mu += math.Sqrt(q) * 10 * rng.NormFloat64()
		ys[i] = mu + 10*rng.NormFloat64()
		if i > 0 && rng.Float64() < 0.1 {
			ys[i] = math.NaN()
		}
	}
	return ys
}

// discountedMeanSSE is the objective for the local constant mean computed
// without the estimator: the one-step forecast is the discounted mean of
// the past, sum lambda^age Y / sum lambda^age with ages counted in buckets
// (gaps included), scored from the (2 + burnIn)-th observation on, when a
// degree-0 state is first Ready.
func discountedMeanSSE(lam float64, burnIn int, series [][]float64) (sse float64, n int64) {
	for _, ys := range series {
		var f, h float64
		seen := 0
		for _, y := range ys {
			f *= lam
			h *= lam
			if math.IsNaN(y) {
				continue
			}
			if seen >= 1+burnIn {
				e := y - h/f
				sse += e * e
				n++
			}
			f++
			h += y
			seen++
		}
	}
	return sse, n
}

// TestSearchLambdaConstantMean: on local level data, the lambda the search
// picks for the local constant mean minimises the one-step MSE: nothing on
// a fine grid of 2,000 lambdas over the search interval does better by more
// than 1e-6 relative. The objective is computed independently of the
// estimator (discountedMeanSSE), and Objective is checked against it.
func TestSearchLambdaConstantMean(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	// q = 0.1: the steady-state Kalman gain of the local level model is
	// alpha = p/(p + 1) with p^2 - q p - q = 0, i.e. (-q + sqrt(q^2 + 4q))/2
	// = 0.270 (Harvey 1989, chapter 3; from memory, re-derived from the
	// steady-state Riccati equation), and simple exponential smoothing with
	// that alpha is the optimal one-step predictor: lambda = 1 - alpha = 0.730.
	const q = 0.1
	alpha := (-q + math.Sqrt(q*q+4*q)) / 2
	series := [][]float64{localLevel(rng, 600, q), localLevel(rng, 400, q)}
	spec := Spec{Degree: 0, BurnIn: 3}

	res, err := SearchLambda(spec, series, SearchOptions{})
	if err != nil {
		t.Fatal(err)
	}
	// Default options: [0.5, 0.999], 40 grid points (search.go).
	const lo, hi, grid = 0.5, 0.999, 40
	if res.Lambda < lo || res.Lambda > hi {
		t.Fatalf("lambda %v outside [%v, %v]", res.Lambda, lo, hi)
	}
	if len(res.Curve) != grid {
		t.Fatalf("curve has %d points, want %d", len(res.Curve), grid)
	}
	if res.Curve[0].Lambda != lo || res.Curve[grid-1].Lambda != hi {
		t.Errorf("curve runs from %v to %v, want %v to %v", res.Curve[0].Lambda, res.Curve[grid-1].Lambda, lo, hi)
	}
	for i, cp := range res.Curve {
		if i > 0 && !(cp.Lambda > res.Curve[i-1].Lambda) {
			t.Errorf("curve lambdas not increasing at %d: %v after %v", i, cp.Lambda, res.Curve[i-1].Lambda)
		}
		sse, n := discountedMeanSSE(cp.Lambda, spec.BurnIn, series)
		// 1e-9: the state forms the same discounted mean through a
		// Cholesky factor and theta; each of the ~1000 forecasts differs by
		// a few eps and the sum of squares keeps that relative size.
		if cp.N != n || !scalar.EqualWithinRel(cp.SSE, sse, 1e-9) || !scalar.EqualWithinRel(cp.MSE, sse/float64(n), 1e-9) {
			t.Errorf("curve at lambda %v: SSE %v over %d, independent %v over %d", cp.Lambda, cp.SSE, cp.N, sse, n)
		}
		if cp.MSE < res.MSE {
			t.Errorf("curve point lambda %v has MSE %v below the result's %v", cp.Lambda, cp.MSE, res.MSE)
		}
	}

	// The fine grid: 2,000 lambdas evenly spaced over [lo, hi].
	best, bestLam := math.Inf(1), 0.0
	for i := 0; i < 2000; i++ {
		lam := lo + (hi-lo)*float64(i)/1999
		sse, n := discountedMeanSSE(lam, spec.BurnIn, series)
		if mse := sse / float64(n); mse < best {
			best, bestLam = mse, lam
		}
	}
	if res.MSE > best*(1+1e-6) {
		t.Errorf("search: lambda %v MSE %.12g; grid of 2000: lambda %v MSE %.12g", res.Lambda, res.MSE, bestLam, best)
	}
	sse, n := discountedMeanSSE(res.Lambda, spec.BurnIn, series)
	if res.N != n || !scalar.EqualWithinRel(res.SSE, sse, 1e-9) {
		t.Errorf("result SSE %v over %d, independent %v over %d", res.SSE, res.N, sse, n)
	}
	// The known structure: within 0.1 of the theoretical 0.73 (1000
	// points leave the minimum of a flat curve a few hundredths uncertain).
	if math.Abs(res.Lambda-(1-alpha)) > 0.1 {
		t.Errorf("lambda %v is far from 1 - alpha = %v of the local level model", res.Lambda, 1-alpha)
	}
	t.Logf("search lambda %.6f MSE %.10g; grid lambda %.6f MSE %.10g; theory %.4f", res.Lambda, res.MSE, bestLam, best, 1-alpha)
}

// TestSearchLambdaBounds: a search confined to [0.9, 0.99] on data whose
// best lambda is near 0.73 stays inside and ends at the lower bound.
func TestSearchLambdaBounds(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	series := [][]float64{localLevel(rng, 300, 0.1)}
	res, err := SearchLambda(Spec{Degree: 0}, series, SearchOptions{Min: 0.9, Max: 0.99, Grid: 10})
	if err != nil {
		t.Fatal(err)
	}
	if res.Lambda < 0.9 || res.Lambda > 0.99 {
		t.Fatalf("lambda %v outside [0.9, 0.99]", res.Lambda)
	}
	// Golden-section tolerance 1e-5 (the default) around the bound.
	if res.Lambda > 0.9+1e-5 {
		t.Errorf("lambda %v, want the lower bound 0.9", res.Lambda)
	}
	if len(res.Curve) != 10 || res.Curve[0].Lambda != 0.9 || res.Curve[9].Lambda != 0.99 {
		t.Errorf("curve %v does not span the bounds with 10 points", res.Curve)
	}
}

// TestSearchLambdaTrend: for a local linear trend the result is no worse
// than any curve point, nor than a fine grid over the bracket the
// refinement searched (the grid points either side of the best one), with
// the objective from Objective.
func TestSearchLambdaTrend(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	// A trend whose slope wanders: Holt's method territory.
	ys := make([]float64, 200)
	level, slope := 100.0, 1.0
	for i := range ys {
		slope += 0.05 * rng.NormFloat64()
		level += slope + 0.5*rng.NormFloat64()
		ys[i] = level + 2*rng.NormFloat64()
	}
	spec := Spec{Degree: 1, BurnIn: 5}
	res, err := SearchLambda(spec, [][]float64{ys}, SearchOptions{})
	if err != nil {
		t.Fatal(err)
	}
	best := 0
	for i, cp := range res.Curve {
		if cp.MSE < res.MSE {
			t.Errorf("curve point lambda %v MSE %v below the result's %v", cp.Lambda, cp.MSE, res.MSE)
		}
		if cp.MSE < res.Curve[best].MSE {
			best = i
		}
	}
	a, b := res.Curve[max(best-1, 0)].Lambda, res.Curve[min(best+1, len(res.Curve)-1)].Lambda
	if res.Lambda < a || res.Lambda > b {
		t.Errorf("lambda %v outside the bracket [%v, %v] around the best grid point", res.Lambda, a, b)
	}
	fine := 100
	if testing.Short() {
		fine = 20
	}
	for i := 0; i <= fine; i++ {
		s := spec
		s.Lambda = a + (b-a)*float64(i)/float64(fine)
		sse, n, err := Objective(s, [][]float64{ys})
		if err != nil {
			t.Fatal(err)
		}
		if mse := sse / float64(n); res.MSE > mse*(1+1e-6) {
			t.Errorf("lambda %v has MSE %.12g below the search's %.12g at %v", s.Lambda, mse, res.MSE, res.Lambda)
		}
	}
}

func TestSearchLambdaErrors(t *testing.T) {
	series := [][]float64{{1, 2, 3, 4, 5, 6, 7, 8}}
	for _, opt := range []SearchOptions{
		{Min: 0.99, Max: 0.9},
		{Min: -0.1, Max: 0.9},
		{Min: 0.5, Max: 1.2},
		{Grid: 2},
		{Tol: -1},
	} {
		if _, err := SearchLambda(Spec{Degree: 0}, series, opt); err == nil {
			t.Errorf("options %+v: no error", opt)
		}
	}
	// p + burn-in = 2 + 10 observations are needed before the first score.
	if _, err := SearchLambda(Spec{Degree: 1, BurnIn: 10}, series, SearchOptions{}); !errors.Is(err, ErrNoErrors) {
		t.Errorf("short series: err = %v, want ErrNoErrors", err)
	}
	if _, err := SearchLambda(Spec{Degree: 7}, series, SearchOptions{}); err == nil {
		t.Error("degree 7: no error")
	}
}
