package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
)

// Run with: go test -run '^$' -bench . -benchmem -count 5 ./estimator/

// benchSpecs are the two model sizes of the targets: a local linear trend
// (p = 2) and the same with two weekly harmonics (p = 6), once with one
// factor and once with a seasonal factor of its own.
var benchSpecs = []Spec{
	{Degree: 1, Lambda: 0.97},
	{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.97},
	{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.97, SeasonLambda: 0.995},
}

// benchSeries is a daily series with a weekly cycle around 100 (an
// invented scenario: tickets opened per day at a help desk).
func benchSeries(n int) []float64 {
	rng := rand.New(rand.NewPCG(1, 1))
	ys := make([]float64, n)
	for i := range ys {
		ys[i] = 100 + 0.05*float64(i) + 5*math.Sin(2*math.Pi*float64(i)/7) + rng.NormFloat64()
	}
	return ys
}

// warmState returns a state that has seen enough buckets to be steady
// (0.97^5000 is 1e-66: T and the t quantiles no longer change).
func warmState(b *testing.B, spec Spec) (*State, []float64) {
	ys := benchSeries(6000)
	st, err := Fit(spec, ys[:5000])
	if err != nil {
		b.Fatal(err)
	}
	if !st.Ready() {
		b.Fatal("warm state is not Ready")
	}
	return st, ys[5000:]
}

// BenchmarkObserve: one new bucket with a value in steady state. Targets:
// 200 ns at p = 2, 2 us at p = 6, no allocation.
func BenchmarkObserve(b *testing.B) {
	for _, spec := range benchSpecs {
		b.Run(benchName(spec), func(b *testing.B) {
			st, ys := warmState(b, spec)
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				if _, err := st.Observe(ys[i%len(ys)]); err != nil {
					b.Fatal(err)
				}
				i++
			}
		})
	}
}

// BenchmarkForecast: forecasts, intervals and cumulative sums 12 buckets
// ahead from a steady state.
func BenchmarkForecast(b *testing.B) {
	for _, spec := range benchSpecs {
		for _, h := range []int{12} {
			b.Run(fmt.Sprintf("%s/H=%d", benchName(spec), h), func(b *testing.B) {
				st, _ := warmState(b, spec)
				b.ReportAllocs()
				for b.Loop() {
					if _, err := st.Forecast(h); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}

// BenchmarkRefit is the alternative the recursion replaces: a weighted
// least-squares refit of the last N buckets by Householder QR (gonum
// mat.QR, as in TestBruteForce), for the p = 6 model.
func BenchmarkRefit(b *testing.B) {
	spec := benchSpecs[1]
	for _, n := range []int{1000, 10000} {
		b.Run(fmt.Sprintf("N=%d", n), func(b *testing.B) {
			ys := benchSeries(n)
			b.ReportAllocs()
			for b.Loop() {
				if bf := newBruteFit(spec, ys, n); !bf.ok {
					b.Fatal("refit failed")
				}
			}
		})
	}
}

// BenchmarkRCond: the scaled reciprocal condition number alone, which
// Observe recomputes every rcondEvery updates of a well-conditioned state
// (see rcondSafe).
func BenchmarkRCond(b *testing.B) {
	for _, spec := range benchSpecs {
		b.Run(benchName(spec), func(b *testing.B) {
			st, _ := warmState(b, spec)
			b.ReportAllocs()
			var sum float64
			for b.Loop() {
				sum += st.scaledRCond()
			}
			if !(sum > 0) {
				b.Fatal("scaled condition number is not positive")
			}
		})
	}
}

// benchName is p=N, with /components when the seasonal factor differs.
func benchName(spec Spec) string {
	if spec.Canonical().SeasonLambda != 0 {
		return fmt.Sprintf("p=%d/components", spec.Params())
	}
	return fmt.Sprintf("p=%d", spec.Params())
}
