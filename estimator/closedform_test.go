package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/gonum/mat"
)

// steadyLambdas are forgetting factors from short to long memory.
var steadyLambdas = []float64{0.8, 0.9, 0.95, 0.97}

// steadySteps is a run long enough that the start is forgotten to below
// rounding: lambda^n < 1e-18, so F = F_inf to working precision.
func steadySteps(lambda float64) int {
	return int(math.Ceil(math.Log(1e-18) / math.Log(lambda)))
}

// steadyGain is the classical steady-state gain F_inf^-1 f(0) of discounted
// least squares for polynomial trends of degree 0, 1 and 2 in the basis
// 1, j, j^2/2 (Brown, Smoothing, Forecasting and Prediction of Discrete Time
// Series, 1963, general exponential smoothing; the same results are derived
// in Montgomery, Johnson and Gardiner, Forecasting and Time Series Analysis,
// chapter on discounted least squares). From memory, checked here:
//
//	constant:  1 - lambda
//	linear:    1 - lambda^2, (1 - lambda)^2
//	quadratic: 1 - lambda^3, 1.5 (1 - lambda)^2 (1 + lambda), (1 - lambda)^3
func steadyGain(degree int, lam float64) []float64 {
	switch degree {
	case 0:
		return []float64{1 - lam}
	case 1:
		return []float64{1 - lam*lam, (1 - lam) * (1 - lam)}
	case 2:
		return []float64{1 - lam*lam*lam, 1.5 * (1 - lam) * (1 - lam) * (1 + lam), (1 - lam) * (1 - lam) * (1 - lam)}
	}
	panic("no closed form")
}

// TestSteadyStateGain checks the gain two ways after a long run: solving
// F g = f(0) with gonum's mat.Cholesky from the state's F, and from the
// update itself, theta_new - L^T theta_old = g e for a one-step error e.
//
// Tolerance 1e-9 relative: F is a sum of a few thousand rounded terms
// (relative error ~ 1e3 eps = 2e-13) and the solve multiplies that by the
// condition number of F_inf: 2e7 unscaled for the quadratic trend at lambda
// = 0.97 (gonum mat.Cholesky.Cond), 50 after diagonal scaling (RCond 0.019).
// The largest error measured while writing this test was 7e-13.
func TestSteadyStateGain(t *testing.T) {
	const rel = 1e-9
	rng := rand.New(rand.NewPCG(1, 1))
	for _, lam := range steadyLambdas {
		for d := 0; d <= 2; d++ {
			t.Run(fmt.Sprintf("d=%d/lambda=%v", d, lam), func(t *testing.T) {
				spec := Spec{Degree: d, Lambda: lam}
				st, err := NewState(spec)
				if err != nil {
					t.Fatal(err)
				}
				for i := 0; i < steadySteps(lam); i++ {
					// Unit noise around a level of 10: the gain does not
					// depend on the data, only on F.
					if _, err := st.Observe(10 + rng.NormFloat64()); err != nil {
						t.Fatal(err)
					}
				}
				want := steadyGain(d, lam)
				p := st.Params()

				// From F: g = F^-1 f(0).
				var ch mat.Cholesky
				if !ch.Factorize(mat.NewSymDense(p, append([]float64(nil), st.f...))) {
					t.Fatal("F is not positive definite")
				}
				var g mat.VecDense
				if err := ch.SolveVecTo(&g, mat.NewVecDense(p, spec.Regressors(0, make([]float64, p)))); err != nil {
					t.Fatal(err)
				}
				for k := range want {
					if !scalar.EqualWithinRel(g.AtVec(k), want[k], rel) {
						t.Errorf("F^-1 f(0) [%d] = %.17g, closed form %.17g", k, g.AtVec(k), want[k])
					}
				}

				// From the update: theta_pred = L^T theta_old is what a
				// bucket without a value leaves (DESIGN.md), then a value
				// with a large one-step error e = 1000 moves theta by g e.
				pred := st.Clone()
				if err := pred.Skip(1); err != nil {
					t.Fatal(err)
				}
				thPred, err := pred.Theta()
				if err != nil {
					t.Fatal(err)
				}
				fc, err := st.Forecast(1)
				if err != nil {
					t.Fatal(err)
				}
				step, err := st.Observe(fc.Forecast[0] + 1000)
				if err != nil {
					t.Fatal(err)
				}
				thNew, err := st.Theta()
				if err != nil {
					t.Fatal(err)
				}
				for k := range want {
					gk := (thNew[k] - thPred[k]) / step.Err
					// theta is ~10 and the move ~1000 g: the difference
					// loses log10(10/(1000 g)) digits, at most 3 here, so
					// this check is held to 1e-8.
					if !scalar.EqualWithinRel(gk, want[k], 1e-8) {
						t.Errorf("update gain [%d] = %.17g, closed form %.17g", k, gk, want[k])
					}
				}
			})
		}
	}
}

// TestSteadyStateSmoothers checks that, once steady, the one-step and
// multi-step forecasts are those of the classical exponential smoothers,
// implemented here from their textbook recursions and started from the
// state's level and slope at a steady point:
//
//   - local constant mean = simple exponential smoothing, alpha = 1 - lambda
//     (Brown 1963; Hyndman and Athanasopoulos, Forecasting: Principles and
//     Practice, 3rd ed., section 8.1):  l_t = alpha y_t + (1 - alpha) l_{t-1}
//   - local linear trend = Holt's linear method with alpha = 1 - lambda^2,
//     beta = (1 - lambda)/(1 + lambda) (Holt 1957; FPP3 section 8.2):
//     l_t = alpha y_t + (1 - alpha)(l_{t-1} + b_{t-1}),
//     b_t = beta (l_t - l_{t-1}) + (1 - beta) b_{t-1},  forecast_{t+m} = l_t + m b_t
//   - local linear trend = Brown's double exponential smoothing with
//     alpha = 1 - lambda (Brown 1963): S1_t = alpha y_t + (1 - alpha) S1_{t-1},
//     S2_t = alpha S1_t + (1 - alpha) S2_{t-1}, a = 2 S1 - S2,
//     b = alpha/(1 - alpha) (S1 - S2), forecast_{t+m} = a + m b.
//
// Tolerance 1e-9 relative with a floor of 1e-9 times the data scale: the
// smoothers and the state round differently, and the difference of
// forecasts is a discounted sum of those roundings, of order eps/(1 - lambda).
func TestSteadyStateSmoothers(t *testing.T) {
	const rel = 1e-9
	const h = 12 // multi-step horizon compared
	const run = 500
	for _, lam := range steadyLambdas {
		t.Run(fmt.Sprintf("lambda=%v", lam), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(1, 1))
			n0 := steadySteps(lam)
			// A random walk with drift 0.5 around 1000: an invented
			// scenario (a warehouse's daily pallet count).
			ys := make([]float64, n0+run)
			level := 1000.0
			for i := range ys {
				level += 0.5 + rng.NormFloat64()
				ys[i] = level + 2*rng.NormFloat64()
			}
			scale := 0.0
			for _, y := range ys {
				scale = math.Max(scale, math.Abs(y))
			}
			abs := rel * scale

			mean, err := Fit(Spec{Degree: 0, Lambda: lam}, ys[:n0])
			if err != nil {
				t.Fatal(err)
			}
			trend, err := Fit(Spec{Degree: 1, Lambda: lam}, ys[:n0])
			if err != nil {
				t.Fatal(err)
			}
			th0, _ := mean.Theta()
			th1, _ := trend.Theta()

			// Simple exponential smoothing.
			alpha := 1 - lam
			sesL := th0[0]
			// Holt.
			ha, hb := 1-lam*lam, (1-lam)/(1+lam)
			holtL, holtB := th1[0], th1[1]
			// Brown's double smoothing, started so that a = level and
			// b = slope: S1 - S2 = b (1 - alpha)/alpha, S1 = a - that.
			d := th1[1] * (1 - alpha) / alpha
			s1, s2 := th1[0]-d, th1[0]-2*d

			for i := n0; i < len(ys); i++ {
				y := ys[i]
				st0, err := mean.Observe(y)
				if err != nil {
					t.Fatal(err)
				}
				st1, err := trend.Observe(y)
				if err != nil {
					t.Fatal(err)
				}
				if !scalar.EqualWithinAbsOrRel(st0.Forecast, sesL, abs, rel) {
					t.Errorf("step %d: constant mean forecast %.17g, SES %.17g", i, st0.Forecast, sesL)
				}
				if want := holtL + holtB; !scalar.EqualWithinAbsOrRel(st1.Forecast, want, abs, rel) {
					t.Errorf("step %d: linear trend forecast %.17g, Holt %.17g", i, st1.Forecast, want)
				}
				if want := 2*s1 - s2 + alpha/(1-alpha)*(s1-s2); !scalar.EqualWithinAbsOrRel(st1.Forecast, want, abs, rel) {
					t.Errorf("step %d: linear trend forecast %.17g, Brown %.17g", i, st1.Forecast, want)
				}

				sesL = alpha*y + (1-alpha)*sesL
				prevL := holtL
				holtL = ha*y + (1-ha)*(holtL+holtB)
				holtB = hb*(holtL-prevL) + (1-hb)*holtB
				s1 = alpha*y + (1-alpha)*s1
				s2 = alpha*s1 + (1-alpha)*s2

				fc0, err := mean.Forecast(h)
				if err != nil {
					t.Fatal(err)
				}
				fc1, err := trend.Forecast(h)
				if err != nil {
					t.Fatal(err)
				}
				a, b := 2*s1-s2, alpha/(1-alpha)*(s1-s2)
				for m := 1; m <= h; m++ {
					if !scalar.EqualWithinAbsOrRel(fc0.Forecast[m-1], sesL, abs, rel) {
						t.Fatalf("step %d: constant mean forecast[%d] %.17g, SES %.17g", i, m, fc0.Forecast[m-1], sesL)
					}
					if want := holtL + float64(m)*holtB; !scalar.EqualWithinAbsOrRel(fc1.Forecast[m-1], want, abs, rel) {
						t.Fatalf("step %d: linear trend forecast[%d] %.17g, Holt %.17g", i, m, fc1.Forecast[m-1], want)
					}
					if want := a + float64(m)*b; !scalar.EqualWithinAbsOrRel(fc1.Forecast[m-1], want, abs, rel) {
						t.Fatalf("step %d: linear trend forecast[%d] %.17g, Brown %.17g", i, m, fc1.Forecast[m-1], want)
					}
				}
			}
		})
	}
}

// TestSteadyStateWeight checks T -> 1/(1 - lambda), the sum of the geometric
// series sum_j lambda^j (any calculus text), and that the Weight of a series
// with gaps is the sum of lambda^age over the observed buckets only.
func TestSteadyStateWeight(t *testing.T) {
	for _, lam := range steadyLambdas {
		st, err := NewState(Spec{Degree: 1, Lambda: lam})
		if err != nil {
			t.Fatal(err)
		}
		for i := 0; i < steadySteps(lam); i++ {
			if _, err := st.Observe(float64(i % 3)); err != nil {
				t.Fatal(err)
			}
		}
		// 1e-13: T is a few thousand rounded multiply-adds converging to
		// a fixed point, each adding at most eps relative error that then
		// decays by lambda; the sum stays within ~eps/(1-lambda) = 1e-14.
		if want := 1 / (1 - lam); !scalar.EqualWithinRel(st.Weight(), want, 1e-13) {
			t.Errorf("lambda %v: T = %.17g, 1/(1-lambda) = %.17g", lam, st.Weight(), want)
		}
		// Gap of 3 buckets then one value: T = lambda^4 T_old + 1.
		old := st.Weight()
		if err := st.Skip(3); err != nil {
			t.Fatal(err)
		}
		if _, err := st.Observe(1); err != nil {
			t.Fatal(err)
		}
		if want := math.Pow(lam, 4)*old + 1; !scalar.EqualWithinRel(st.Weight(), want, 1e-15) {
			t.Errorf("lambda %v: T after a gap = %.17g, lambda^4 T + 1 = %.17g", lam, st.Weight(), want)
		}
	}
}
