package estimator

import (
	"errors"
	"fmt"
	"math"
)

// SearchOptions bounds the lambda search. Zero values take the defaults.
type SearchOptions struct {
	Min, Max float64 // search interval, default [0.5, 0.999]
	Grid     int     // grid points, default 40
	Tol      float64 // golden-section tolerance on lambda, default 1e-5
}

func (o SearchOptions) withDefaults() (SearchOptions, error) {
	if o.Min == 0 {
		o.Min = 0.5
	}
	if o.Max == 0 {
		o.Max = 0.999
	}
	if o.Grid == 0 {
		o.Grid = 40
	}
	if o.Tol == 0 {
		o.Tol = 1e-5
	}
	switch {
	case !(o.Min > 0 && o.Min < o.Max && o.Max <= 1):
		return o, fmt.Errorf("lambda search bounds [%v, %v] are not inside (0, 1]: use for example 0.5 and 0.999", o.Min, o.Max)
	case o.Grid < 3:
		return o, fmt.Errorf("a lambda grid of %d points is too coarse: use 3 or more", o.Grid)
	case !(o.Tol > 0):
		return o, fmt.Errorf("lambda search tolerance %v must be positive", o.Tol)
	}
	return o, nil
}

// CurvePoint is the objective at one lambda.
type CurvePoint struct {
	Lambda float64
	MSE    float64 // SSE / N, +Inf when no error was scored
	SSE    float64 // sum of squared one-step errors after burn-in
	N      int64   // errors scored
}

// SearchResult is the lambda the search chose and the grid it looked at.
type SearchResult struct {
	Lambda float64
	MSE    float64
	SSE    float64
	N      int64
	Curve  []CurvePoint // the grid, in increasing lambda
}

// ErrNoErrors is returned by SearchLambda when no series is long enough to
// score a single one-step error after burn-in.
var ErrNoErrors = errors.New("estimator: no one-step errors to compare: the series are shorter than the parameters plus burn-in")

// DefaultGrid is the grid SearchLambda uses by default: 40 lambdas from 0.5
// to 0.999, evenly spaced in log effective memory 1/(1 - lambda), so that
// long memories are sampled as densely as short ones.
func DefaultGrid() []float64 {
	o, _ := SearchOptions{}.withDefaults()
	return grid(o)
}

func grid(o SearchOptions) []float64 {
	lo, hi := math.Log(1/(1-o.Min)), math.Log(1/(1-math.Min(o.Max, 1-1e-12)))
	out := make([]float64, o.Grid)
	for i := range out {
		m := math.Exp(lo + (hi-lo)*float64(i)/float64(o.Grid-1))
		out[i] = 1 - 1/m
	}
	out[0], out[len(out)-1] = o.Min, o.Max
	return out
}

// Objective returns the sum of squared one-step prediction errors after
// burn-in, and their count, of spec (with its Lambda) over every series; NaN
// in a series marks a gap.
func Objective(spec Spec, series [][]float64) (sse float64, n int64, err error) {
	for _, ys := range series {
		st, err := NewState(spec)
		if err != nil {
			return 0, 0, err
		}
		gap := 0
		for _, y := range ys {
			if math.IsNaN(y) {
				gap++
				continue
			}
			if gap > 0 {
				if err := st.Skip(gap); err != nil {
					return 0, 0, err
				}
				gap = 0
			}
			step, err := st.Observe(y)
			if err != nil {
				return 0, 0, err
			}
			if step.Scored {
				sse += step.Err * step.Err
				n++
			}
		}
	}
	return sse, n, nil
}

func evaluate(spec Spec, lambda float64, series [][]float64) (CurvePoint, error) {
	spec.Lambda = lambda
	sse, n, err := Objective(spec, series)
	if err != nil {
		return CurvePoint{}, err
	}
	cp := CurvePoint{Lambda: lambda, SSE: sse, N: n, MSE: math.Inf(1)}
	if n > 0 {
		cp.MSE = sse / float64(n)
	}
	return cp, nil
}

// SearchLambda chooses the forgetting factor that minimises the one-step
// prediction error of spec over the given series together: the mean of the
// squared one-step errors after burn-in (the sum, divided by the count so
// that lambdas scoring a different number of steps compare fairly). It
// evaluates a grid evenly spaced in log memory, then refines around the
// best grid point by golden-section search. spec.Lambda is ignored.
func SearchLambda(spec Spec, series [][]float64, opt SearchOptions) (SearchResult, error) {
	o, err := opt.withDefaults()
	if err != nil {
		return SearchResult{}, err
	}
	spec.Lambda = o.Max
	if err := spec.Validate(); err != nil {
		return SearchResult{}, err
	}
	g := grid(o)
	res := SearchResult{Curve: make([]CurvePoint, 0, len(g))}
	best := -1
	for i, lam := range g {
		cp, err := evaluate(spec, lam, series)
		if err != nil {
			return SearchResult{}, err
		}
		res.Curve = append(res.Curve, cp)
		if cp.N > 0 && (best < 0 || cp.MSE < res.Curve[best].MSE) {
			best = i
		}
	}
	if best < 0 {
		return SearchResult{}, ErrNoErrors
	}
	top := res.Curve[best]
	a, b := g[max(best-1, 0)], g[min(best+1, len(g)-1)]
	// Golden-section search on [a, b] (Kiefer 1953; any numerical text).
	const invPhi = 0.6180339887498949 // (sqrt(5) - 1) / 2
	c, d := b-invPhi*(b-a), a+invPhi*(b-a)
	fc, err := evaluate(spec, c, series)
	if err != nil {
		return SearchResult{}, err
	}
	fd, err := evaluate(spec, d, series)
	if err != nil {
		return SearchResult{}, err
	}
	for b-a > o.Tol {
		if fc.MSE <= fd.MSE {
			b, d, fd = d, c, fc
			c = b - invPhi*(b-a)
			if fc, err = evaluate(spec, c, series); err != nil {
				return SearchResult{}, err
			}
		} else {
			a, c, fc = c, d, fd
			d = a + invPhi*(b-a)
			if fd, err = evaluate(spec, d, series); err != nil {
				return SearchResult{}, err
			}
		}
	}
	for _, cp := range []CurvePoint{fc, fd} {
		if cp.N > 0 && cp.MSE < top.MSE {
			top = cp
		}
	}
	res.Lambda, res.MSE, res.SSE, res.N = top.Lambda, top.MSE, top.SSE, top.N
	return res, nil
}

// Backtest runs spec over ys (NaN marks a gap) and returns the statistics
// of the one-step errors after the warm-up, the buckets Choose leaves
// unscored for this model (Warmup): so that a model's backtest error is the
// error model choice compares, wherever it is read (the live endpoint's
// backtest table, the CLI, tuning).
func Backtest(spec Spec, ys []float64) (ErrorStats, error) {
	st, err := NewState(spec)
	if err != nil {
		return ErrorStats{}, err
	}
	w := min(Warmup(spec), len(ys)/3)
	if err := st.Run(ys[:w]); err != nil {
		return ErrorStats{}, err
	}
	st.errs = errorSums{}
	if err := st.Run(ys[w:]); err != nil {
		return ErrorStats{}, err
	}
	return st.Errors(), nil
}

// Warmup is the number of leading buckets whose one-step errors model
// choice leaves unscored for a model of this structure: three times its
// parameters plus the burn-in, and at least two periods (ChooseOptions
// caps it at a third of the longest series).
func Warmup(spec Spec) int {
	return max(3*spec.Params()+spec.BurnIn, int(math.Ceil(2*spec.Period)))
}
