package estimator

import (
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"
)

// TestSpecValidate: every bad spec is an error that names the bad value
// and says what to use instead.
func TestSpecValidate(t *testing.T) {
	bad := []struct {
		name string
		spec Spec
		want []string // substrings the message must carry
	}{
		{"degree 5", Spec{Degree: 5, Lambda: 0.9}, []string{"degree 5", "0 to 3"}},
		{"degree -1", Spec{Degree: -1, Lambda: 0.9}, []string{"degree -1", "0 to 3"}},
		{"lambda 0", Spec{Degree: 1, Lambda: 0}, []string{"lambda 0", "(0, 1]"}},
		{"lambda 1.3", Spec{Degree: 1, Lambda: 1.3}, []string{"lambda 1.3", "(0, 1]"}},
		{"lambda -0.5", Spec{Degree: 1, Lambda: -0.5}, []string{"lambda -0.5"}},
		{"lambda NaN", Spec{Degree: 1, Lambda: math.NaN()}, []string{"lambda NaN"}},
		{"period 1", Spec{Degree: 1, Period: 1, Harmonics: 1, Lambda: 0.9}, []string{"period 1", "at least 2"}},
		{"period -7", Spec{Degree: 1, Period: -7, Harmonics: 1, Lambda: 0.9}, []string{"period -7"}},
		{"period Inf", Spec{Degree: 1, Period: math.Inf(1), Harmonics: 1, Lambda: 0.9}, []string{"period +Inf"}},
		{"harmonics > period/2", Spec{Degree: 1, Period: 7, Harmonics: 4, Lambda: 0.9}, []string{"4 harmonics", "period 7", "at most 3"}},
		{"harmonics > period/2 non-integer", Spec{Degree: 0, Period: 5.5, Harmonics: 3, Lambda: 0.9}, []string{"3 harmonics", "at most 2"}},
		{"harmonics 0 with period", Spec{Degree: 1, Period: 7, Harmonics: 0, Lambda: 0.9}, []string{"0 harmonics", "1 to 6"}},
		{"harmonics 7", Spec{Degree: 1, Period: 30, Harmonics: 7, Lambda: 0.9}, []string{"7 harmonics", "1 to 6"}},
		{"harmonics without period", Spec{Degree: 1, Harmonics: 2, Lambda: 0.9}, []string{"2 harmonics", "period"}},
		{"burn-in -1", Spec{Degree: 1, Lambda: 0.9, BurnIn: -1}, []string{"burn-in -1"}},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			err := c.spec.Validate()
			if err == nil {
				t.Fatalf("%+v: no error", c.spec)
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not mention %q", err, w)
				}
			}
			if _, err := NewState(c.spec); err == nil {
				t.Errorf("NewState(%+v) accepted a bad spec", c.spec)
			}
		})
	}
}

// TestSpecParams counts regressors: degree + 1 polynomial terms plus two
// per harmonic, except one (the cosine) for a harmonic at exactly period/2,
// whose sine sin(pi j) is 0 at every integer j.
func TestSpecParams(t *testing.T) {
	cases := []struct {
		spec Spec
		p    int
	}{
		{Spec{Degree: 0, Lambda: 1}, 1},
		{Spec{Degree: 3, Lambda: 1}, 4},
		{Spec{Degree: 1, Period: 7, Harmonics: 3, Lambda: 1}, 2 + 6},
		// Period 4 with 2 harmonics: k = 2 is at period/2, so 3 seasonal terms.
		{Spec{Degree: 0, Period: 4, Harmonics: 2, Lambda: 1}, 1 + 3},
		{Spec{Degree: 1, Period: 4, Harmonics: 2, Lambda: 1}, 2 + 3},
		{Spec{Degree: 2, Period: 4, Harmonics: 2, Lambda: 1}, 3 + 3},
		{Spec{Degree: 2, Period: 12, Harmonics: 6, Lambda: 1}, 3 + 11},
		{Spec{Degree: 1, Period: 2, Harmonics: 1, Lambda: 1}, 2 + 1},
		{Spec{Degree: 0, Period: 365.25 / 7, Harmonics: 6, Lambda: 1}, 1 + 12},
	}
	for _, c := range cases {
		if err := c.spec.Validate(); err != nil {
			t.Fatalf("%v: %v", c.spec, err)
		}
		if got := c.spec.Params(); got != c.p {
			t.Errorf("%v: Params() = %d, want %d", c.spec, got, c.p)
		}
		if got := len(c.spec.Regressors(0.5, make([]float64, MaxParams))); got != c.p {
			t.Errorf("%v: len(Regressors) = %d, want %d", c.spec, got, c.p)
		}
	}
}

// TestShiftProperty: f(j + k) = L^k f(j) and L^k L^-k = I, the defining
// property of the regressors (DESIGN.md). Fractional k is checked only for
// models without a cosine-only harmonic at period/2: cos(pi j) alone has the
// shift property only for integer steps (cos(pi (j + 1/2)) needs the sine
// that is left out), and the state only ever shifts by whole buckets.
//
// Tolerance 1e-12 relative with a 1e-11 absolute floor: f entries reach
// 27.5^3/6 = 3.5e3 here and each entry of L^k f sums at most 16 products,
// so the rounding is a few eps times 3.5e3, below 1e-11.
func TestShiftProperty(t *testing.T) {
	specs := []Spec{
		{Degree: 3, Period: 365.25 / 7, Harmonics: 6, Lambda: 1},
		{Degree: 2, Period: 4, Harmonics: 2, Lambda: 1},
		{Degree: 1, Period: 7, Harmonics: 3, Lambda: 1},
	}
	for _, spec := range specs {
		p := spec.Params()
		for _, j := range []float64{-20, -3, 0, 1, 7.5} {
			for _, k := range []float64{-5, -1, 1, 2.5, 13} {
				if k != math.Trunc(k) && spec.Period == 2*float64(spec.Harmonics) {
					continue
				}
				fj := spec.Regressors(j, make([]float64, p))
				want := spec.Regressors(j+k, make([]float64, p))
				lk := spec.Shift(k, make([]float64, p*p))
				got := make([]float64, p)
				newSparseRows(lk, p, nil, nil, nil).mulVec(fj, got)
				for i := range got {
					if !scalar.EqualWithinAbsOrRel(got[i], want[i], 1e-11, 1e-12) {
						t.Errorf("%v: (L^%v f(%v))[%d] = %v, f(%v)[%d] = %v", spec, k, j, i, got[i], j+k, i, want[i])
					}
				}
				linv := spec.Shift(-k, make([]float64, p*p))
				for r := 0; r < p; r++ {
					for c := 0; c < p; c++ {
						var s float64
						for m := 0; m < p; m++ {
							s += lk[r*p+m] * linv[m*p+c]
						}
						want := 0.0
						if r == c {
							want = 1
						}
						// L^k entries reach 13^3/6 = 366: the product's
						// rounding is a few eps times 366^2.
						if !scalar.EqualWithinAbs(s, want, 1e-9) {
							t.Errorf("%v: (L^%v L^-%v)[%d,%d] = %v", spec, k, k, r, c, s)
						}
					}
				}
			}
		}
	}
}
