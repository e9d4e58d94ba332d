package estimator

import (
	"fmt"
	"math"
)

// MaxHorizon is the longest forecast a State gives in one call.
const MaxHorizon = 100000

// Forecast holds the forecasts for l = 1..H buckets ahead; index l-1 in
// every slice. Interval bounds are NaN before the first one-step error
// (DF 0) or while DF is too small for a finite t quantile (below about
// 0.0065).
type Forecast struct {
	Forecast         []float64 // f(l)^T theta_N
	SE               []float64 // sigma sqrt(V_l), see State.Forecast
	Lower80, Upper80 []float64 // forecast -+ t_{0.10}(DF) SE
	Lower95, Upper95 []float64 // forecast -+ t_{0.025}(DF) SE

	// Cumulative forecast of the next l buckets, sum_{k<=l} forecast_k, with
	// standard error sigma sqrt(Vc_l), see State.Forecast.
	CumForecast, CumSE     []float64
	CumLower95, CumUpper95 []float64
	Sigma, DF, T80, T95    float64
}

// Forecast returns forecasts and intervals for l = 1..h:
//
//	forecast_{N+l|N} = f(l)^T theta_N
//	forecast -+ t_{alpha/2}(DF) sigma sqrt(V_l)
//	V_l  = 1 + f(l)^T F^-1 f(l) + sum_{m=1..l} w(f(m))
//	Vc_l = l + c_l^T F^-1 c_l   + sum_{k=1..l} w(c_k),  c_k = sum_{m<=k} f(m)
//	w(x) = max(0, x^T D^-1/2 F^-1 D^-1/2 x - x^T F^-1 x)
//
// sigma and DF are those of Sigma and DF (the discounted mean square of
// the standardised one-step errors). V_l is the l-step variance factor of
// the discount model written as a dynamic linear model: the state evolves
// with the one-step evolution variance W = D^-1/2 P D^-1/2 - P, P = L^T
// F^-1 L, that the discount implies at the forecast origin, held fixed over
// the horizon (West and Harrison, ch. 6: a discount defines W_t+1, and
// forecasts further ahead keep it; from memory). Each term adds the
// evolution noise entering at one step to the forecast it reaches; the
// cumulative factor sums the same noise over every later bucket it moves.
// With one factor w(x) = (1/lambda - 1) x^T F^-1 x; with two factors a term
// can come out negative, and is then left out. V_1 = 1 + q, the factor of
// the one-step errors that estimate sigma, so the one-step interval is
// their discounted root mean square times 1 + q now over its average: the
// interval is sound for every lambda, however short the memory.
// Least squares' own factor 1 + f(l)^T F^-1 f(l) is the first two terms.
func (st *State) Forecast(h int) (*Forecast, error) {
	if h < 1 || h > MaxHorizon {
		return nil, fmt.Errorf("estimator: horizon %d is out of range: use 1 to %d buckets", h, MaxHorizon)
	}
	if !st.Ready() {
		return nil, ErrNotReady
	}
	p := st.p
	buf := make([]float64, 12*h)
	take := func() []float64 {
		s := buf[:h:h]
		buf = buf[h:]
		return s
	}
	fc := &Forecast{
		Forecast: take(), SE: take(), Lower80: take(), Upper80: take(), Lower95: take(), Upper95: take(),
		CumForecast: take(), CumSE: take(), CumLower95: take(), CumUpper95: take(),
	}
	fc.DF = st.DF()
	fc.Sigma = st.Sigma()
	fc.T80, fc.T95 = math.NaN(), math.NaN()
	if fc.DF > 0 {
		// The quantiles Observe cached for this T - p, if any (read only,
		// so that concurrent queries do not race): in steady state T stops
		// changing, and the quantile is most of the cost of a forecast.
		cached := false
		for _, q := range st.tq.slot {
			if q.t80 != 0 && q.df == fc.DF {
				fc.T80, fc.T95, cached = q.t80, q.t95, true
			}
		}
		if !cached {
			fc.T80, fc.T95 = studentQuantiles(fc.DF)
		}
	}
	fl := make([]float64, p)
	cum := make([]float64, p)
	scaled := make([]float64, p)
	// w(x) given q = x^T F^-1 x (see above).
	evolution := func(x []float64, q float64) float64 {
		if !st.comp {
			return (1/st.spec.Lambda - 1) * q
		}
		for i := range scaled {
			scaled[i] = x[i] / st.dhalf[i]
		}
		w := st.quadForm(scaled) - q
		if math.IsNaN(w) || math.IsInf(w, 0) {
			// Inf - Inf after a long gap, where F^-1 is huge: use the
			// bound x^T D^-1/2 F^-1 D^-1/2 x <= q / min(lambda) instead.
			lmin := math.Min(st.spec.Lambda, st.spec.SeasonLambda)
			w = (1/lmin - 1) * q
		}
		return math.Max(0, w)
	}
	var cumY, evol, evolCum float64
	for l := 1; l <= h; l++ {
		st.spec.Regressors(float64(l), fl)
		y := dot(fl, st.theta)
		for i := range cum {
			cum[i] += fl[i]
		}
		cumY += y
		i := l - 1
		fc.Forecast[i], fc.CumForecast[i] = y, cumY
		ql, qc := st.quadForm(fl), st.quadForm(cum)
		evol += evolution(fl, ql)
		evolCum += evolution(cum, qc)
		fc.SE[i] = fc.Sigma * math.Sqrt(1+ql+evol)
		fc.CumSE[i] = fc.Sigma * math.Sqrt(float64(l)+qc+evolCum)
		fc.Lower80[i], fc.Upper80[i] = y-fc.T80*fc.SE[i], y+fc.T80*fc.SE[i]
		fc.Lower95[i], fc.Upper95[i] = y-fc.T95*fc.SE[i], y+fc.T95*fc.SE[i]
		fc.CumLower95[i], fc.CumUpper95[i] = cumY-fc.T95*fc.CumSE[i], cumY+fc.T95*fc.CumSE[i]
	}
	return fc, nil
}

// Slope is the local trend at the newest bucket.
type Slope struct {
	// Level is the trend part at j = 0, theta_1 (seasonal terms excluded).
	Level float64
	// Slope is d/dj of the trend part at j = 0, theta_2, in value units per
	// bucket; 0 for a degree-0 model.
	Slope float64
	// SE is the standard error sigma sqrt([F^-1]_22) (sigma of
	// State.Sigma); NaN before the first one-step error or for a degree-0
	// model.
	SE float64
	// DF is the degrees of freedom of sigma (State.DF).
	DF float64
}

// T is the slope's t statistic Slope/SE; 0 when both are 0 (a constant
// series) and NaN when SE is undefined.
func (sl Slope) T() float64 {
	if sl.Slope == 0 && sl.SE == 0 {
		return 0
	}
	return sl.Slope / sl.SE
}

// Slope returns the level and slope of the trend at the newest bucket.
func (st *State) Slope() (Slope, error) {
	if !st.Ready() {
		return Slope{}, ErrNotReady
	}
	sl := Slope{Level: st.theta[0], DF: st.DF(), SE: math.NaN()}
	if st.spec.Degree == 0 {
		return sl, nil
	}
	sl.Slope = st.theta[1]
	if sigma := st.Sigma(); !math.IsNaN(sigma) {
		// [F^-1]_22 = e_2^T F^-1 e_2.
		e := make([]float64, st.p)
		e[1] = 1
		sl.SE = sigma * math.Sqrt(st.quadForm(e))
	}
	return sl, nil
}

// ErrorStats summarises the one-step prediction errors e = Y - forecast of the
// observations that arrived while the state was Ready (after burn-in).
type ErrorStats struct {
	N     int64   // scored one-step errors
	MAE   float64 // mean |e|; NaN when N = 0
	RMSE  float64 // sqrt(mean e^2)
	Bias  float64 // mean e (positive: actuals above forecasts)
	MAPE  float64 // mean |e / Y| over actuals Y != 0, as a fraction; NaN if none
	NAPE  int64   // errors that entered MAPE
	NInt  int64   // errors that had an interval (T - p > 0 one step earlier)
	In80  int64   // actuals inside the 80 % interval issued one step earlier
	In95  int64   // same, 95 %
	Cov80 float64 // In80 / NInt; NaN when NInt = 0
	Cov95 float64 // In95 / NInt

	// Discounted by lambda per bucket, like the fit itself:
	// sum lambda^j |e_j| / sum lambda^j and the same for e^2.
	DiscMAE, DiscRMSE float64
}

// Errors returns the one-step error statistics so far.
func (st *State) Errors() ErrorStats {
	es := st.errs
	nan := math.NaN()
	out := ErrorStats{N: es.n, NAPE: es.nAPE, NInt: es.nInt, In80: es.in80, In95: es.in95,
		MAE: nan, RMSE: nan, Bias: nan, MAPE: nan, Cov80: nan, Cov95: nan, DiscMAE: nan, DiscRMSE: nan}
	if es.n > 0 {
		n := float64(es.n)
		out.MAE, out.RMSE, out.Bias = es.sumAbs/n, math.Sqrt(es.sumSq/n), es.sumErr/n
	}
	if es.nAPE > 0 {
		out.MAPE = es.sumAPE / float64(es.nAPE)
	}
	if es.nInt > 0 {
		out.Cov80, out.Cov95 = float64(es.in80)/float64(es.nInt), float64(es.in95)/float64(es.nInt)
	}
	if es.dWeight > 0 {
		out.DiscMAE, out.DiscRMSE = es.dAbs/es.dWeight, math.Sqrt(es.dSq/es.dWeight)
	}
	return out
}

// Fit runs a fresh state over ys, one bucket each, where NaN marks a bucket
// without a value (a gap). Leading NaNs are skipped like any other gap.
func Fit(spec Spec, ys []float64) (*State, error) {
	st, err := NewState(spec)
	if err != nil {
		return nil, err
	}
	if err := st.Run(ys); err != nil {
		return nil, err
	}
	return st, nil
}

// Run folds ys into the state, one bucket each; NaN marks a gap.
func (st *State) Run(ys []float64) error {
	gap := 0
	for i, y := range ys {
		if math.IsNaN(y) {
			gap++
			continue
		}
		if gap > 0 {
			if err := st.Skip(gap); err != nil {
				return err
			}
			gap = 0
		}
		if _, err := st.Observe(y); err != nil {
			return fmt.Errorf("bucket %d: %w", i, err)
		}
	}
	return st.Skip(gap)
}
