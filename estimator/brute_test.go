package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/gonum/mat"
)

// bruteFit is discounted least squares solved directly, the definition the
// recursion must reproduce: over the observed buckets of ys[:n] (NaN marks a
// bucket without a value), the point of age j = n-1-i buckets (gaps
// included) has weight lambda^j and regressors f(-j); the weighted problem
//
//	minimise sum_j lambda^j (Y_{N-j} - f(-j)^T theta)^2
//
// is solved by Householder QR of the rows sqrt(lambda^j) f(-j)^T with gonum's
// mat.QR and SolveVecTo (LAPACK dgeqrf/dormqr/dtrtrs), independent of the
// state's Cholesky recursion.
type bruteFit struct {
	spec  Spec
	ok    bool // the design has full column rank
	theta []float64
	s, t  float64 // weighted residual sum of squares, sum of weights
	qr    mat.QR
	p     int
}

func newBruteFit(spec Spec, ys []float64, n int) *bruteFit {
	p := spec.Params()
	bf := &bruteFit{spec: spec, p: p}
	var rows, ws, targets []float64
	f := make([]float64, p)
	m := 0
	for i := 0; i < n; i++ {
		if math.IsNaN(ys[i]) {
			continue
		}
		j := float64(n - 1 - i)
		w := math.Pow(spec.Lambda, j)
		spec.Regressors(-j, f)
		sw := math.Sqrt(w)
		for _, x := range f {
			rows = append(rows, sw*x)
		}
		targets = append(targets, sw*ys[i])
		ws = append(ws, w)
		bf.t += w
		m++
	}
	if m < p {
		return bf
	}
	x := mat.NewDense(m, p, rows)
	bf.qr.Factorize(x)
	var theta mat.VecDense
	if err := bf.qr.SolveVecTo(&theta, false, mat.NewVecDense(m, targets)); err != nil {
		// mat.Condition: numerically rank deficient (cond > 1e16).
		return bf
	}
	bf.ok = true
	bf.theta = theta.RawVector().Data
	// S computed from its definition, the residuals of the solved fit.
	var fitted mat.VecDense
	fitted.MulVec(x, &theta)
	for k := 0; k < m; k++ {
		r := targets[k] - fitted.AtVec(k)
		bf.s += r * r
	}
	return bf
}

// quad returns v^T (X^T W X)^-1 v. The minimum-norm solution z of
// (W^1/2 X)^T z = v is Q R^-T v, so ||z||^2 = v^T (R^T R)^-1 v.
func (bf *bruteFit) quad(v []float64) float64 {
	var z mat.VecDense
	if err := bf.qr.SolveVecTo(&z, true, mat.NewVecDense(len(v), append([]float64(nil), v...))); err != nil {
		panic(err)
	}
	return mat.Dot(&z, &z)
}

func (bf *bruteFit) sigma() float64 {
	return math.Sqrt(bf.s / (bf.t - float64(bf.p)))
}

// forecast returns forecast_l, SE_l, the cumulative sums and their SE for
// l = 1..h from the formulas in forecast.go's doc comments with one factor
// lambda, given sigma:
//
//	SE_l    = sigma sqrt(1 + f(l)^T F^-1 f(l) + (1/lambda - 1) sum_{m<=l} f(m)^T F^-1 f(m))
//	CumSE_l = sigma sqrt(l + c_l^T F^-1 c_l + (1/lambda - 1) sum_{k<=l} c_k^T F^-1 c_k),
//	c_l = sum_{k<=l} f(k)
func (bf *bruteFit) forecast(h int, sigma float64) (forecast, se, cum, cumSE []float64) {
	f := make([]float64, bf.p)
	c := make([]float64, bf.p)
	w := 1/bf.spec.Lambda - 1
	var sum, evol, evolCum float64
	for l := 1; l <= h; l++ {
		bf.spec.Regressors(float64(l), f)
		y := dot(f, bf.theta)
		sum += y
		for i := range c {
			c[i] += f[i]
		}
		qf, qc := bf.quad(f), bf.quad(c)
		evol += w * qf
		evolCum += w * qc
		forecast = append(forecast, y)
		se = append(se, sigma*math.Sqrt(1+qf+evol))
		cum = append(cum, sum)
		cumSE = append(cumSE, sigma*math.Sqrt(float64(l)+qc+evolCum))
	}
	return
}

// bruteCase is one model and series for the brute-force comparison.
type bruteCase struct {
	spec Spec
	n    int     // series length
	gaps float64 // probability that a bucket has no value
	// loose: the design stays ill conditioned for long (a non-integer
	// period over a window shorter than two cycles), so most buckets are
	// checked at c eps kappa, not 1e-9; the final bucket is strict anyway.
	loose bool
}

func (c bruteCase) String() string {
	return fmt.Sprintf("d=%d/P=%v/K=%d/lambda=%v/n=%d", c.spec.Degree, c.spec.Period, c.spec.Harmonics, c.spec.Lambda, c.n)
}

// synthSeries draws a series with a level of about 100, a trend, a weekly-ish
// cycle of the given period, unit-variance noise and gaps. The numbers are an
// invented scenario (daily parcels through a depot), chosen only so that
// every model term has something to fit.
func synthSeries(rng *rand.Rand, n int, period, gapProb float64) []float64 {
	ys := make([]float64, n)
	for i := range ys {
		t := float64(i)
		y := 100 + 0.3*t - 0.001*t*t + rng.NormFloat64()
		if period > 0 {
			y += 5*math.Sin(2*math.Pi*t/period) + 2*math.Cos(4*math.Pi*t/period)
		}
		if i > 0 && rng.Float64() < gapProb {
			y = math.NaN()
		}
		ys[i] = y
	}
	return ys
}

// TestBruteForce checks the recursion against a direct weighted least
// squares solve (bruteFit, gonum mat.QR) at every bucket where the state is
// Ready: theta, S, T, sigma, forecasts and SE for l = 1..12, cumulative
// forecasts and their SE, interval widths, the slope and its SE, and the
// one-step forecast each Observe reports.
//
// Tolerance: relative 1e-9 (the brief's target), with an absolute floor of
// 1e-9 times the series' scale (max |Y|, about 100-130 here) for values in Y
// units. The rounding error of a least-squares solution is bounded in
// proportion to ||Y|| (Golub and Van Loan, Matrix Computations, 4th ed.,
// section 5.3.8), not to the entry itself, so an entry that is small by
// cancellation (a slope near zero, a forecast crossing zero) can only be
// held to the size of the data. theta_k for k >= 1 carries units Y per
// bucket^k; its floor is divided by the size of its regressor (colScale).
//
// Where F is ill conditioned the 1e-9 target is out of reach of any method
// that works with F (the normal equations): a Cholesky solve has forward
// error up to c eps kappa(F) (Higham, Accuracy and Stability of Numerical
// Algorithms, 2nd ed., theorem 10.4 and section 20.4), and the state is
// Ready down to a scaled rcond of MinRCond = 1e-10, where that is 1e-6 and
// more. So the relative tolerance of each check is max(1e-9, c eps kappa),
// with kappa = 1/RCond for what is recomputed from F and h at each step
// (theta, forecasts, slope) and, for what depends on S (sigma, SE, S), the
// largest eps/RCond seen so far discounted by lambda per bucket, because an
// error that entered S at an earlier step decays only as lambda^age. A
// 300-bit big.Float solve of the normal equations confirmed, while these
// tests were written, that the QR side is the accurate one (agreement to
// 1e-14) in the ill-conditioned stretch. The report at the end says how
// many checks ran at the strict 1e-9.
func TestBruteForce(t *testing.T) {
	const h = 12 // forecast horizon of the brief
	const rel = 1e-9
	cases := []bruteCase{}
	for _, lam := range []float64{0.9, 0.97, 1.0} {
		for d := 0; d <= 2; d++ {
			cases = append(cases,
				bruteCase{spec: Spec{Degree: d, Lambda: lam}, n: 150, gaps: 0.15},
				bruteCase{spec: Spec{Degree: d, Period: 7, Harmonics: 2, Lambda: lam}, n: 150, gaps: 0.15},
				// 365.25/7 = 52.18 weeks a year: a non-integer period needs
				// a few cycles before the harmonics separate from the trend.
				bruteCase{spec: Spec{Degree: d, Period: 365.25 / 7, Harmonics: 2, Lambda: lam}, n: 260, gaps: 0.1, loose: true},
			)
		}
	}
	// A burn-in and a cosine-only harmonic at period/2 (period 4, K = 2).
	cases = append(cases,
		bruteCase{spec: Spec{Degree: 1, Period: 4, Harmonics: 2, Lambda: 0.95, BurnIn: 5}, n: 120, gaps: 0.2},
		bruteCase{spec: Spec{Degree: 3, Lambda: 0.9}, n: 120, gaps: 0.1},
	)
	rng := rand.New(rand.NewPCG(1, 1))
	for _, c := range cases {
		ys := synthSeries(rng, c.n, c.spec.Period, c.gaps)
		t.Run(c.String(), func(t *testing.T) {
			checkBrute(t, c.spec, ys, h, rel, c.loose)
		})
	}
}

// condFactor is the constant c in the tolerance c eps kappa. Measured while
// writing this test, the largest ratio of observed error to eps kappa was
// 24 for theta and forecasts and 830 for S and SE (S sums hundreds of
// rounded terms even when kappa is 1); 1000 covers both.
const condFactor = 1000

func checkBrute(t *testing.T, spec Spec, ys []float64, h int, rel float64, loose bool) {
	t.Helper()
	var scale float64
	for _, y := range ys {
		if !math.IsNaN(y) {
			scale = math.Max(scale, math.Abs(y))
		}
	}
	st, err := NewState(spec)
	if err != nil {
		t.Fatal(err)
	}
	p := spec.Params()
	const eps = 0x1p-52 // float64 machine epsilon
	var relFit, relS float64
	// sErr bounds the absolute error S carries from earlier steps: each
	// step's term e^2/(1+q) enters with relative error up to eps/RCond of
	// the state it was computed from, and decays by lambda per bucket; S
	// started from its definition syy - h^T theta carries eps syy.
	var sErr, prevS float64
	wasFitted := false
	near := func(what string, n int, got, want, rel, abs float64) {
		t.Helper()
		if !scalar.EqualWithinAbsOrRel(got, want, abs, rel) {
			t.Errorf("N=%d %s = %.17g, brute force %.17g (diff %.3g, tolerance %.1g)", n, what, got, want, got-want, rel)
		}
	}
	compared, strict, steps := 0, 0, 0
	// es: the one-step error sums from the brute-force forecasts, with the
	// definitions of ErrorStats (forecast.go): plain means over scored
	// errors, and sums discounted by lambda per bucket.
	var es errorSums
	errRel := rel
	var prev *bruteFit
	var prevRelFit, prevRelS float64
	for n := 1; n <= len(ys); n++ {
		y := ys[n-1]
		prevRCond := st.RCond()
		es.decay(spec.Lambda)
		if math.IsNaN(y) {
			if err := st.Skip(1); err != nil {
				t.Fatal(err)
			}
		} else {
			wasReady := st.Ready()
			sigPrev := st.Sigma()
			step, err := st.Observe(y)
			if err != nil {
				t.Fatal(err)
			}
			if step.Scored != wasReady {
				t.Fatalf("N=%d Scored = %v, state was Ready = %v", n, step.Scored, wasReady)
			}
			if step.Scored && prev != nil && prev.ok {
				// The one-step forecast issued at bucket n-1 for bucket n,
				// held to the tolerances of that bucket.
				yh, se, _, _ := prev.forecast(1, sigPrev)
				near("step forecast", n, step.Forecast, yh[0], prevRelFit, rel*scale)
				near("step err", n, step.Err, y-yh[0], prevRelFit, rel*scale)
				if !math.IsNaN(sigPrev) {
					near("step SE", n, step.SE, se[0], prevRelS, rel*scale)
				}
				steps++
				be := y - yh[0]
				es.n++
				es.sumAbs += math.Abs(be)
				es.sumSq += be * be
				es.sumErr += be
				if y != 0 {
					es.nAPE++
					es.sumAPE += math.Abs(be / y)
				}
				es.dAbs += math.Abs(be)
				es.dSq += be * be
				es.dWeight++
				errRel = math.Max(errRel, prevRelFit)
			}
		}
		bf := newBruteFit(spec, ys, n)
		switch {
		case !bf.ok:
		case !math.IsNaN(y) && wasFitted:
			term := math.Max(0, bf.s-spec.Lambda*prevS)
			sErr = spec.Lambda*sErr + eps/math.Min(prevRCond, st.RCond())*term
		case !math.IsNaN(y):
			sErr = eps * syy(spec.Lambda, ys[:n])
		default:
			sErr *= spec.Lambda
		}
		wasFitted = st.RCond() >= MinRCond
		prevS = bf.s
		relFit = math.Max(rel, condFactor*eps/st.RCond())
		relS = math.Max(rel, condFactor*(eps/st.RCond()+sErr/bf.s))
		if n == len(ys) {
			// The final state of every case is held to the strict
			// tolerance whatever its history.
			relFit, relS = rel, rel
		}
		prevRelFit, prevRelS = relFit, relS
		prev = bf
		if !st.Ready() {
			continue
		}
		if !bf.ok {
			t.Fatalf("N=%d state is Ready but the brute-force design is rank deficient", n)
		}
		compared++
		if relFit == rel && relS == rel {
			strict++
		}
		abs := rel * scale
		theta, err := st.Theta()
		if err != nil {
			t.Fatal(err)
		}
		for k := range theta {
			near(fmt.Sprintf("theta[%d]", k), n, theta[k], bf.theta[k], relFit, abs/colScale(spec, k))
		}
		near("T", n, st.Weight(), bf.t, rel, 0)
		near("S", n, st.RSS(), bf.s, relS, abs)
		if st.LSDF() > 0 {
			near("least-squares sigma", n, st.LSSigma(), bf.sigma(), relS, abs)
		}
		if st.DF() <= 0 {
			continue
		}
		fc, err := st.Forecast(h)
		if err != nil {
			t.Fatal(err)
		}
		// The scale sigma (the discounted mean square of standardised
		// one-step errors, a sum the state keeps) is the state's; the
		// variance factors come from the brute-force F.
		yh, se, cum, cumSE := bf.forecast(h, st.Sigma())
		for l := 0; l < h; l++ {
			// Cumulative values sum l+1 forecasts: the floor grows with l.
			cabs := abs * float64(l+1)
			near(fmt.Sprintf("forecast[%d]", l+1), n, fc.Forecast[l], yh[l], relFit, abs)
			near(fmt.Sprintf("SE[%d]", l+1), n, fc.SE[l], se[l], relS, abs)
			near(fmt.Sprintf("cum[%d]", l+1), n, fc.CumForecast[l], cum[l], relFit, cabs)
			near(fmt.Sprintf("cumSE[%d]", l+1), n, fc.CumSE[l], cumSE[l], relS, cabs)
			if math.IsNaN(fc.T95) {
				// No interval: T - p is below the 0.0065 where the t
				// quantile overflows (checked below).
				continue
			}
			// Interval widths: twice the t quantile times SE.
			near(fmt.Sprintf("Upper80-Lower80[%d]", l+1), n, fc.Upper80[l]-fc.Lower80[l], 2*fc.T80*se[l], relS, abs)
			near(fmt.Sprintf("Upper95-Lower95[%d]", l+1), n, fc.Upper95[l]-fc.Lower95[l], 2*fc.T95*se[l], relS, abs)
			near(fmt.Sprintf("CumUpper95-CumLower95[%d]", l+1), n, fc.CumUpper95[l]-fc.CumLower95[l], 2*fc.T95*cumSE[l], relS, cabs)
		}
		if math.IsNaN(fc.T95) && fc.DF >= 0.0065 {
			t.Errorf("N=%d no interval at DF = %v", n, fc.DF)
		}
		sl, err := st.Slope()
		if err != nil {
			t.Fatal(err)
		}
		near("level", n, sl.Level, bf.theta[0], relFit, abs)
		if spec.Degree >= 1 {
			e2 := make([]float64, p)
			e2[1] = 1
			near("slope", n, sl.Slope, bf.theta[1], relFit, abs/colScale(spec, 1))
			near("slope SE", n, sl.SE, st.Sigma()*math.Sqrt(bf.quad(e2)), relS, abs/colScale(spec, 1))
		}
	}
	got := st.Errors()
	if got.N != es.n || got.NAPE != es.nAPE || got.NInt > got.N || got.In95 > got.NInt || got.In80 > got.In95 {
		t.Errorf("error counts %+v, brute force N=%d NAPE=%d", got, es.n, es.nAPE)
	}
	if es.n > 0 {
		nf := float64(es.n)
		// An error carries the absolute rounding of its forecast, at most
		// errRel * scale; so do the means.
		eabs := errRel * scale
		near("MAE", len(ys), got.MAE, es.sumAbs/nf, errRel, eabs)
		near("RMSE", len(ys), got.RMSE, math.Sqrt(es.sumSq/nf), errRel, eabs)
		near("Bias", len(ys), got.Bias, es.sumErr/nf, errRel, eabs)
		near("MAPE", len(ys), got.MAPE, es.sumAPE/float64(es.nAPE), errRel, errRel)
		near("DiscMAE", len(ys), got.DiscMAE, es.dAbs/es.dWeight, errRel, eabs)
		near("DiscRMSE", len(ys), got.DiscRMSE, math.Sqrt(es.dSq/es.dWeight), errRel, eabs)
	}
	t.Logf("%d Ready buckets compared, %d at the strict 1e-9, %d one-step forecasts", compared, strict, steps)
	if compared < len(ys)/2 {
		t.Errorf("only %d of %d buckets were Ready: the comparison saw too little", compared, len(ys))
	}
	if !loose && strict < compared/2 {
		t.Errorf("only %d of %d comparisons ran at the strict tolerance", strict, compared)
	}
	if steps < len(ys)/3 {
		t.Errorf("only %d one-step forecasts compared", steps)
	}
}

// syy is sum_j lambda^j Y_{N-j}^2 over the observed buckets of ys.
func syy(lambda float64, ys []float64) float64 {
	var sum float64
	for i, y := range ys {
		if !math.IsNaN(y) {
			sum += math.Pow(lambda, float64(len(ys)-1-i)) * y * y
		}
	}
	return sum
}

// colScale is the typical size of regressor k over the fitting window:
// (window)^k / k! for polynomial term k, where the window is the effective
// memory 1/(1 - lambda) (capped at 100 buckets for lambda = 1, about the
// series length here), and 1 for harmonic terms.
func colScale(spec Spec, k int) float64 {
	if k > spec.Degree {
		return 1
	}
	w := 100.0
	if spec.Lambda < 1 {
		w = math.Min(w, 1/(1-spec.Lambda))
	}
	s := 1.0
	for i := 1; i <= k; i++ {
		s *= w / float64(i)
	}
	return s
}
