// Package estimator holds the mathematics of sidetrend: local trend models
// fitted by discounted (exponentially weighted) least squares with a
// forgetting factor, updated recursively with the shift matrix L.
//
// A model is a set of regressors f(j) with the shift property
//
//	f(j+1) = L f(j)
//
// made of a polynomial trend of degree d (terms 1, j, j^2/2!, j^3/3!) and
// optional harmonic pairs (sin(k w j), cos(k w j)), w = 2 pi / period. Time is
// counted in buckets relative to the newest bucket N; a point of age j has
// weight lambda^j. The package knows nothing about databases or files.
package estimator

import (
	"errors"
	"fmt"
	"math"
)

// MaxDegree is the highest polynomial degree a Spec accepts.
const MaxDegree = 3

// MaxHarmonics is the largest number of harmonic pairs a Spec accepts.
const MaxHarmonics = 6

// MaxParams is the largest number of regressors any valid Spec has:
// MaxDegree+1 polynomial terms plus two per harmonic.
const MaxParams = MaxDegree + 1 + 2*MaxHarmonics

// Spec describes a local trend model and how it forgets.
type Spec struct {
	// Degree of the polynomial trend, 0 (local constant mean) to 3.
	Degree int
	// Period of the seasonal cycle in buckets; 0 means no seasonal terms.
	// Non-integer periods are allowed (365.25/7 for yearly in weeks).
	Period float64
	// Harmonics is the number of harmonic pairs, 1..6, when Period > 0.
	Harmonics int
	// Lambda is the forgetting factor in (0, 1]; 1 is ordinary least squares.
	// With SeasonLambda set it is the factor of the trend block only.
	Lambda float64
	// SeasonLambda is the forgetting factor of the seasonal block (the
	// harmonic pairs) in (0, 1]; 0 means the same as Lambda. With two
	// different factors the state is updated by component discounting (see
	// State).
	SeasonLambda float64
	// BurnIn is the number of observed points, beyond the number of
	// parameters, that must be in before the state reports Ready.
	BurnIn int
}

// Validate reports whether s is a model the estimator can fit. The error
// reads as a sentence that says what to change.
func (s Spec) Validate() error {
	if s.Degree < 0 || s.Degree > MaxDegree {
		return fmt.Errorf("degree %d is not supported: use a polynomial degree from 0 to %d", s.Degree, MaxDegree)
	}
	if math.IsNaN(s.Lambda) || s.Lambda <= 0 || s.Lambda > 1 {
		return fmt.Errorf("lambda %v is outside (0, 1]: use a forgetting factor such as 0.95 (1 means no forgetting)", s.Lambda)
	}
	if math.IsNaN(s.SeasonLambda) || s.SeasonLambda < 0 || s.SeasonLambda > 1 {
		return fmt.Errorf("seasonal lambda %v is outside (0, 1]: use a forgetting factor such as 0.99, or 0 for the same as lambda", s.SeasonLambda)
	}
	if s.BurnIn < 0 {
		return fmt.Errorf("burn-in %d is negative: use 0 or more points", s.BurnIn)
	}
	if math.IsNaN(s.Period) || math.IsInf(s.Period, 0) || s.Period < 0 {
		return fmt.Errorf("period %v is not a number of buckets: use a positive period such as 7, or none", s.Period)
	}
	if s.Period == 0 {
		if s.Harmonics != 0 {
			return fmt.Errorf("%d harmonics need a period: give a seasonal period in buckets, or use 0 harmonics", s.Harmonics)
		}
		if s.SeasonLambda != 0 && s.SeasonLambda != s.Lambda {
			return fmt.Errorf("seasonal lambda %v needs a period: give a seasonal period in buckets, or leave the seasonal lambda out", s.SeasonLambda)
		}
		return nil
	}
	if s.Period < 2 {
		return fmt.Errorf("period %v is too short: a seasonal period must be at least 2 buckets", s.Period)
	}
	if s.Harmonics < 1 || s.Harmonics > MaxHarmonics {
		return fmt.Errorf("%d harmonics are not supported: use 1 to %d harmonic pairs with a period", s.Harmonics, MaxHarmonics)
	}
	if float64(s.Harmonics) > s.Period/2 {
		return fmt.Errorf("%d harmonics are too many for period %v: use at most %d (period/2)",
			s.Harmonics, s.Period, int(math.Floor(s.Period/2)))
	}
	return nil
}

// SeasonFactor is the forgetting factor of the seasonal block: SeasonLambda,
// or Lambda when it is 0.
func (s Spec) SeasonFactor() float64 {
	if s.SeasonLambda == 0 {
		return s.Lambda
	}
	return s.SeasonLambda
}

// Canonical returns s with SeasonLambda 0 when it adds nothing (no seasonal
// terms, or equal to Lambda), so that two specs of the same model compare
// equal.
func (s Spec) Canonical() Spec {
	if s.Harmonics == 0 || s.SeasonLambda == s.Lambda {
		s.SeasonLambda = 0
	}
	return s
}

// componentDiscount reports whether the trend and seasonal blocks forget at
// different rates.
func (s Spec) componentDiscount() bool {
	return s.Harmonics > 0 && s.SeasonFactor() != s.Lambda
}

// VarianceFactor is the factor that discounts the residual scale (T and S):
// the larger of the two block factors (see State).
func (s Spec) VarianceFactor() float64 {
	return math.Max(s.Lambda, s.SeasonFactor())
}

// Params is the number of regressors p of a valid spec.
func (s Spec) Params() int {
	p := s.Degree + 1
	for k := 1; k <= s.Harmonics; k++ {
		if s.nyquist(k) {
			p++
		} else {
			p += 2
		}
	}
	return p
}

// nyquist reports whether harmonic k sits at exactly period/2, where
// sin(k w j) = sin(pi j) is zero at every integer j and only the cosine
// term is kept.
func (s Spec) nyquist(k int) bool {
	return s.Period > 0 && 2*float64(k) == s.Period
}

// ErrNotReady is returned by queries on a state that has too few points or an
// ill-conditioned F to give an estimate.
var ErrNotReady = errors.New("estimator: not enough well-spread points for an estimate yet")

// Regressors writes f(j) into dst[:p] and returns it. Terms come in this
// order: 1, j, j^2/2!, j^3/3! up to the degree, then for each harmonic k the
// pair sin(k w j), cos(k w j), or only cos(k w j) at period/2.
func (s Spec) Regressors(j float64, dst []float64) []float64 {
	p := s.Params()
	dst = dst[:p]
	term := 1.0
	for i := 0; i <= s.Degree; i++ {
		if i > 0 {
			term *= j / float64(i)
		}
		dst[i] = term
	}
	i := s.Degree + 1
	for k := 1; k <= s.Harmonics; k++ {
		a := 2 * math.Pi * float64(k) * j / s.Period
		if s.nyquist(k) {
			dst[i] = math.Cos(a)
			i++
			continue
		}
		sn, cs := math.Sincos(a)
		dst[i], dst[i+1] = sn, cs
		i += 2
	}
	return dst
}

// Shift writes L^k, the p x p matrix with f(j+k) = L^k f(j), row-major into
// dst[:p*p] and returns it. k may be negative: L^-1 moves f back one step.
//
// The polynomial block of L^k has entries k^(r-c)/(r-c)! for r >= c; each
// harmonic pair has the rotation block [[cos a, sin a], [-sin a, cos a]] with
// a = k w k_h; a cosine-only harmonic at period/2 has the entry cos(pi k).
func (s Spec) Shift(k float64, dst []float64) []float64 {
	p := s.Params()
	dst = dst[:p*p]
	for i := range dst {
		dst[i] = 0
	}
	for r := 0; r <= s.Degree; r++ {
		term := 1.0
		for c := r; c >= 0; c-- {
			if c < r {
				term *= k / float64(r-c)
			}
			dst[r*p+c] = term
		}
	}
	i := s.Degree + 1
	for h := 1; h <= s.Harmonics; h++ {
		a := 2 * math.Pi * float64(h) * k / s.Period
		if s.nyquist(h) {
			dst[i*p+i] = math.Cos(a)
			i++
			continue
		}
		sn, cs := math.Sincos(a)
		dst[i*p+i], dst[i*p+i+1] = cs, sn
		dst[(i+1)*p+i], dst[(i+1)*p+i+1] = -sn, cs
		i += 2
	}
	return dst
}
