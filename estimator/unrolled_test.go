package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
)

// unrolledSpecs are the models with p = 2, the ones NewState runs through
// the unrolled 2 x 2 kernels.
var unrolledSpecs = []Spec{
	{Degree: 1, Lambda: 0.9},
	{Degree: 1, Lambda: 0.97, BurnIn: 3},
	{Degree: 1, Lambda: 1},
	{Degree: 0, Period: 2, Harmonics: 1, Lambda: 0.95},
	{Degree: 0, Period: 2, Harmonics: 1, Lambda: 1},
}

// TestUnrolledMatchesGeneral runs each p = 2 model twice over the same
// script of observations, gaps, overflowing values, clones and decodes: once
// through the unrolled kernels and once with them switched off, through the
// general p x p kernels. The unrolled kernels do the same floating-point
// operations in the same order (their products with the entries 0 and +-1
// of L^-1 are exact, so a fused multiply-add changes nothing either), so
// every value must agree exactly (== on float64, which also equates -0 and
// +0). TestBruteForce holds the unrolled path to discounted least squares
// solved by QR; this test holds it to the general one.
func TestUnrolledMatchesGeneral(t *testing.T) {
	for _, spec := range []Spec{{Degree: 0, Lambda: 0.9}, {Degree: 2, Lambda: 0.9}, {Degree: 1, Period: 7, Harmonics: 1, Lambda: 0.9}} {
		if st, _ := NewState(spec); st.unrolled {
			t.Errorf("%v (p = %d) runs the unrolled kernels, meant only for p = 2", spec, spec.Params())
		}
	}
	for si, spec := range unrolledSpecs {
		t.Run(spec.String(), func(t *testing.T) {
			fast, err := NewState(spec)
			if err != nil {
				t.Fatal(err)
			}
			if !fast.unrolled {
				t.Fatalf("p = %d state does not run the unrolled kernels", fast.Params())
			}
			slow := fast.Clone()
			slow.unrolled = false
			rng := rand.New(rand.NewPCG(uint64(si), 2))
			ready := 0
			for i := 0; i < 3000; i++ {
				var what string
				var errFast, errSlow error
				switch r := rng.IntN(100); {
				case r < 4:
					k := 1 + rng.IntN(6)
					what = fmt.Sprintf("Skip(%d)", k)
					errFast, errSlow = fast.Skip(k), slow.Skip(k)
				case r < 5:
					what = "decode"
					b := mustMarshal(t, fast)
					if fast, err = UnmarshalState(b); err != nil {
						t.Fatal(err)
					}
					if slow, err = UnmarshalState(mustMarshal(t, slow)); err != nil {
						t.Fatal(err)
					}
					slow.unrolled = false
				case r < 6:
					what = "clone"
					fast = fast.Clone()
				default:
					y := 100 + 0.5*float64(i%400) + 10*math.Sin(float64(i)) + 3*rng.NormFloat64()
					switch rng.IntN(40) {
					case 0:
						y = 0
					case 1:
						y = 5e-324 // the smallest subnormal
					case 2:
						y = 1e200 // its square overflows: an error
					case 3:
						y = math.Inf(-1)
					case 4:
						y = 1e150 // folds in, then dominates for a while
					}
					what = fmt.Sprintf("Observe(%v)", y)
					var sf, ss Step
					sf, errFast = fast.Observe(y)
					ss, errSlow = slow.Observe(y)
					if !stepsAgree(sf, ss) {
						t.Fatalf("op %d %s: unrolled step %+v, general %+v", i, what, sf, ss)
					}
				}
				if fmt.Sprint(errFast) != fmt.Sprint(errSlow) {
					t.Fatalf("op %d %s: unrolled error %v, general %v", i, what, errFast, errSlow)
				}
				if !fast.unrolled {
					t.Fatalf("op %d %s: state no longer runs the unrolled kernels", i, what)
				}
				if d := diffStates(fast, slow); d != "" {
					t.Fatalf("op %d %s: unrolled and general states differ: %s", i, what, d)
				}
				if fast.Ready() {
					ready++
				}
			}
			if ready < 2000 {
				t.Errorf("only %d of 3000 operations left a Ready state: the comparison saw too little", ready)
			}
		})
	}
}

func sameFloat(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }

func stepsAgree(a, b Step) bool {
	return a.Scored == b.Scored && a.In80 == b.In80 && a.In95 == b.In95 &&
		sameFloat(a.Forecast, b.Forecast) && sameFloat(a.Err, b.Err) && sameFloat(a.SE, b.SE) &&
		sameFloat(a.Lower95, b.Lower95) && sameFloat(a.Upper95, b.Upper95)
}

// diffStates describes the first difference between the statistics and
// derived values of a and b, or returns "".
func diffStates(a, b *State) string {
	scalars := [][2]float64{
		{a.t, b.t}, {a.s, b.s}, {a.syy, b.syy}, {a.rcond, b.rcond},
		{a.errs.sumAbs, b.errs.sumAbs}, {a.errs.sumSq, b.errs.sumSq}, {a.errs.sumErr, b.errs.sumErr},
		{a.errs.sumAPE, b.errs.sumAPE}, {a.errs.dAbs, b.errs.dAbs}, {a.errs.dSq, b.errs.dSq},
		{a.errs.dWeight, b.errs.dWeight},
	}
	for k, v := range scalars {
		if !sameFloat(v[0], v[1]) {
			return fmt.Sprintf("scalar %d (T, S, Syy, rcond, error sums): %v vs %v", k, v[0], v[1])
		}
	}
	if a.pd != b.pd || a.rcondAge != b.rcondAge || a.n != b.n || a.steps != b.steps ||
		a.errs.n != b.errs.n || a.errs.nAPE != b.errs.nAPE || a.errs.nInt != b.errs.nInt ||
		a.errs.in80 != b.errs.in80 || a.errs.in95 != b.errs.in95 {
		return fmt.Sprintf("flags or counts: %v %d %d %d %+v vs %v %d %d %d %+v",
			a.pd, a.rcondAge, a.n, a.steps, a.errs, b.pd, b.rcondAge, b.n, b.steps, b.errs)
	}
	p := a.p
	vecs := []struct {
		name string
		x, y []float64
	}{{"F", a.f, b.f}, {"h", a.h, b.h}, {"theta", a.theta, b.theta}}
	if a.pd {
		// Only the lower triangle of the factor means anything.
		for r := 0; r < p; r++ {
			vecs = append(vecs, struct {
				name string
				x, y []float64
			}{fmt.Sprintf("chol row %d", r), a.chol[r*p : r*p+r+1], b.chol[r*p : r*p+r+1]})
		}
	}
	for _, v := range vecs {
		for i := range v.x {
			if !sameFloat(v.x[i], v.y[i]) {
				return fmt.Sprintf("%s[%d]: %v vs %v", v.name, i, v.x[i], v.y[i])
			}
		}
	}
	return ""
}
