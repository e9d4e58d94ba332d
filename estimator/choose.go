package estimator

import (
	"fmt"
	"math"
	"sort"
	"strings"
)

// Score is the accuracy of one model over buckets that its fit had not
// seen: one-step-ahead (or l-step-ahead) errors from a rolling origin.
type Score struct {
	N     int64   // errors scored
	MSE   float64 // mean squared error, +Inf when N = 0
	RMSE  float64
	MAE   float64
	NInt  int64   // errors that had an interval
	Cov80 float64 // share of actuals inside the 80 % interval, NaN when NInt = 0
	Cov95 float64
}

type scoreSums struct {
	n, nInt, in80, in95 int64
	sq, abs             float64
}

func (s *scoreSums) add(e, lower80, upper80, lower95, upper95, y float64) {
	s.n++
	s.sq += e * e
	s.abs += math.Abs(e)
	if !math.IsNaN(lower95) && !math.IsNaN(upper95) {
		s.nInt++
		if y >= lower80 && y <= upper80 {
			s.in80++
		}
		if y >= lower95 && y <= upper95 {
			s.in95++
		}
	}
}

// addStep adds a one-step error with the coverage Observe decided.
func (s *scoreSums) addStep(step Step) {
	s.n++
	s.sq += step.Err * step.Err
	s.abs += math.Abs(step.Err)
	if !math.IsNaN(step.SE) {
		s.nInt++
		if step.In80 {
			s.in80++
		}
		if step.In95 {
			s.in95++
		}
	}
}

func (s scoreSums) score() Score {
	out := Score{N: s.n, NInt: s.nInt, MSE: math.Inf(1), RMSE: math.Inf(1), MAE: math.Inf(1),
		Cov80: math.NaN(), Cov95: math.NaN()}
	if s.n > 0 {
		out.MSE = s.sq / float64(s.n)
		out.RMSE, out.MAE = math.Sqrt(out.MSE), s.abs/float64(s.n)
	}
	if s.nInt > 0 {
		out.Cov80, out.Cov95 = float64(s.in80)/float64(s.nInt), float64(s.in95)/float64(s.nInt)
	}
	return out
}

// OneStep runs spec over ys (NaN marks a gap) and scores the one-step
// forecasts of the buckets from index from on (0-based): each forecast is
// issued from the data before its bucket only (a rolling origin), its
// interval is the 80 % and 95 % interval issued with it. A bucket whose
// forecast could not be issued (the state not Ready) is not scored; ready
// reports whether every scored bucket had one.
func OneStep(spec Spec, ys []float64, from int) (Score, bool, error) {
	var sums scoreSums
	ok, err := oneStep(spec, ys, from, &sums, false)
	return sums.score(), ok, err
}

// oneStep adds the one-step errors of spec over ys from bucket from on to
// sums; pointOnly leaves the intervals out (model choice needs only the
// errors, and deciding coverage evaluates the t distribution).
func oneStep(spec Spec, ys []float64, from int, sums *scoreSums, pointOnly bool) (bool, error) {
	st, err := NewState(spec)
	if err != nil {
		return false, err
	}
	st.pointOnly = pointOnly
	all := true
	gap := 0
	for i, y := range ys {
		if math.IsNaN(y) {
			gap++
			continue
		}
		if gap > 0 {
			if err := st.Skip(gap); err != nil {
				return false, err
			}
			gap = 0
		}
		step, err := st.Observe(y)
		if err != nil {
			return false, fmt.Errorf("bucket %d: %w", i, err)
		}
		if i < from {
			continue
		}
		if !step.Scored {
			all = false
			continue
		}
		sums.addStep(step)
	}
	return all, nil
}

// AheadScore is the accuracy at one horizon.
type AheadScore struct {
	Horizon int
	Score
}

// Ahead scores the forecasts 1..h buckets ahead of every origin whose
// target bucket lies at index from or later (0-based), and the cumulative
// forecast of the h buckets after each origin against the sum of their
// actuals (only where all h have a value; Horizon h in the second result).
// Origins are every bucket from the first Ready one; each forecast uses the
// data up to its origin only.
func Ahead(spec Spec, ys []float64, from, h int) ([]AheadScore, Score, error) {
	return ahead(spec, ys, from, h, nil)
}

// AheadMapped is Ahead for a series fitted on a transformed scale (ys holds
// the transformed values): back maps values, forecasts and bounds to the
// data's scale, where the errors are measured (a monotone back, such as
// exp for a log scale, keeps each bound's probability). Cumulative sums are
// not scored (the bounds of a sum do not map back).
func AheadMapped(spec Spec, ys []float64, from, h int, back func(float64) float64) ([]AheadScore, error) {
	out, _, err := ahead(spec, ys, from, h, back)
	return out, err
}

func ahead(spec Spec, ys []float64, from, h int, back func(float64) float64) ([]AheadScore, Score, error) {
	if h < 1 || h > MaxHorizon {
		return nil, Score{}, fmt.Errorf("estimator: horizon %d is out of range: use 1 to %d buckets", h, MaxHorizon)
	}
	st, err := NewState(spec)
	if err != nil {
		return nil, Score{}, err
	}
	sums := make([]scoreSums, h)
	var cum scoreSums
	for i, y := range ys {
		if math.IsNaN(y) {
			if err := st.Skip(1); err != nil {
				return nil, Score{}, err
			}
		} else if _, err := st.Observe(y); err != nil {
			return nil, Score{}, fmt.Errorf("bucket %d: %w", i, err)
		}
		if !st.Ready() || i+h < from || i+1 >= len(ys) {
			continue
		}
		fc, err := st.Forecast(h)
		if err != nil {
			return nil, Score{}, err
		}
		total, complete := 0.0, i+h < len(ys)
		for l := 1; l <= h; l++ {
			j := i + l
			if j >= len(ys) || math.IsNaN(ys[j]) {
				complete = false
				continue
			}
			total += ys[j]
			if j < from {
				continue
			}
			k := l - 1
			if back != nil {
				y := back(ys[j])
				sums[k].add(y-back(fc.Forecast[k]), back(fc.Lower80[k]), back(fc.Upper80[k]), back(fc.Lower95[k]), back(fc.Upper95[k]), y)
				continue
			}
			sums[k].add(ys[j]-fc.Forecast[k], fc.Lower80[k], fc.Upper80[k], fc.Lower95[k], fc.Upper95[k], ys[j])
		}
		if complete && i+1 >= from && back == nil {
			k := h - 1
			// The cumulative 80 % bound is not kept: the 95 % one only.
			cum.add(total-fc.CumForecast[k], math.NaN(), math.NaN(), fc.CumLower95[k], fc.CumUpper95[k], total)
		}
	}
	out := make([]AheadScore, h)
	for k := range out {
		out[k] = AheadScore{Horizon: k + 1, Score: sums[k].score()}
	}
	return out, cum.score(), nil
}

// ChooseOptions say what model choice may vary. Empty fields take the
// defaults; a field with one value fixes that setting.
type ChooseOptions struct {
	// Period of the seasonal cycle in buckets; 0 for none. Not searched.
	Period float64
	// Degrees of the trend to try; default 0, 1, 2.
	Degrees []int
	// Harmonics to try; default 0 to min(MaxHarmonics, period/2) with a
	// period, 0 without.
	Harmonics []int
	// Lambdas are the trend factors to try; default ChoiceGrid.
	Lambdas []float64
	// SeasonLambdas are the seasonal factors to try; default ChoiceGrid.
	// []float64{0} keeps one factor for both blocks.
	SeasonLambdas []float64
	BurnIn        int
	// Warmup is the number of buckets at the start of each series whose
	// one-step errors are not scored (the fit is still settling and every
	// model must be scored on the same buckets). Default: three times the
	// largest number of parameters tried plus the burn-in, and at least
	// two periods, but at most a third of the longest series.
	Warmup int
}

// ChoiceGrid is the default grid of forgetting factors for model choice:
// 20 factors from 0.5 to 0.999, evenly spaced in log effective memory
// 1/(1 - lambda) (memories 2 to 1000 buckets).
func ChoiceGrid() []float64 {
	return grid(SearchOptions{Min: 0.5, Max: 0.999, Grid: 20})
}

// refineStructures is how many of the best degrees and numbers of
// harmonics with one factor get their two factors searched.
const (
	refineStructures = 1000
	refineRounds     = 2
)

// Candidate is one model with its held-out score.
type Candidate struct {
	Spec  Spec
	Score Score
}

// Choice is the outcome of Choose.
type Choice struct {
	Candidate
	// Warmup is the number of leading buckets of each series left unscored.
	Warmup int
	// AtBound names each setting whose chosen value is the first or last
	// it was allowed (the optimum may lie beyond it), e.g. "lambda at
	// 0.999, the top of its range".
	AtBound []string
	// Tried is the best candidate of every degree and number of harmonics,
	// best first.
	Tried []Candidate
}

// Choose picks the model with the smallest mean squared one-step error
// over the series together (one pooled objective: a tracker's series share
// one model; pass one series for a per-series choice). Each one-step
// forecast comes from the data before its bucket only (a rolling origin
// over the given data, which is the training part: the caller holds out
// what it will test on), and the first Warmup buckets of every series are
// not scored. It scores every degree and number of harmonics with one
// factor for both blocks over the grid, then, for the refineStructures
// best of them, searches the factors coordinate-wise, twice: the seasonal
// factor with the trend factor so far, then the trend factor with that
// seasonal factor. A candidate that cannot forecast a scored
// bucket (not Ready) is not chosen.
func Choose(series [][]float64, opt ChooseOptions) (Choice, error) {
	o, err := opt.withDefaults(series)
	if err != nil {
		return Choice{}, err
	}
	var tried []Candidate
	evals := map[Spec]Candidate{}
	eval := func(s Spec) (Candidate, error) {
		s = s.Canonical()
		if c, ok := evals[s]; ok {
			return c, nil
		}
		var sums scoreSums
		all := true
		for _, ys := range series {
			ok, err := oneStep(s, ys, o.Warmup, &sums, true)
			if err != nil {
				return Candidate{}, err
			}
			all = all && ok
		}
		c := Candidate{Spec: s, Score: sums.score()}
		if !all || sums.n == 0 {
			c.Score.MSE, c.Score.RMSE = math.Inf(1), math.Inf(1)
		}
		evals[s] = c
		return c, nil
	}
	// First every degree and number of harmonics with one factor, then
	// the refinement of the factors for the best few of them.
	type structure struct {
		base Spec
		best Candidate
	}
	var structs []*structure
	for _, d := range o.Degrees {
		for _, k := range o.Harmonics {
			base := Spec{Degree: d, Harmonics: k, BurnIn: o.BurnIn}
			if k > 0 {
				base.Period = o.Period
			}
			if base.Lambda = o.Lambdas[0]; base.Validate() != nil {
				continue
			}
			structs = append(structs, &structure{base: base, best: Candidate{Score: Score{MSE: math.Inf(1)}}})
		}
	}
	try := func(st *structure, s Spec) error {
		c, err := eval(s)
		if err != nil {
			return err
		}
		if c.Score.MSE < st.best.Score.MSE {
			st.best = c
		}
		return nil
	}
	for _, st := range structs {
		for _, l := range o.Lambdas {
			s := st.base
			s.Lambda = l
			if st.base.Harmonics > 0 && !o.oneFactor() && !contains(o.SeasonLambdas, l) {
				// The seasonal grid does not allow this factor: one
				// factor is then the seasonal grid's nearest.
				s.SeasonLambda = nearest(o.SeasonLambdas, l)
			}
			if err := try(st, s); err != nil {
				return Choice{}, err
			}
		}
	}
	sort.SliceStable(structs, func(i, j int) bool { return structs[i].best.Score.MSE < structs[j].best.Score.MSE })
	for i, st := range structs {
		if i >= refineStructures || st.base.Harmonics == 0 || o.oneFactor() || math.IsInf(st.best.Score.MSE, 1) {
			continue
		}
		for round := 0; round < refineRounds; round++ {
			lt := st.best.Spec.Lambda
			for _, ls := range o.SeasonLambdas {
				s := st.base
				s.Lambda, s.SeasonLambda = lt, ls
				if err := try(st, s); err != nil {
					return Choice{}, err
				}
			}
			ls := st.best.Spec.SeasonFactor()
			for _, lt := range o.Lambdas {
				s := st.base
				s.Lambda, s.SeasonLambda = lt, ls
				if err := try(st, s); err != nil {
					return Choice{}, err
				}
			}
		}
	}
	for _, st := range structs {
		if !math.IsInf(st.best.Score.MSE, 1) {
			tried = append(tried, st.best)
		}
	}
	if len(tried) == 0 {
		return Choice{}, ErrNoErrors
	}
	sort.SliceStable(tried, func(i, j int) bool { return tried[i].Score.MSE < tried[j].Score.MSE })
	ch := Choice{Candidate: tried[0], Warmup: o.Warmup, Tried: tried}
	// The chosen model's coverage over the same buckets (the search scored
	// point errors only).
	var sums scoreSums
	for _, ys := range series {
		if _, err := oneStep(ch.Spec, ys, o.Warmup, &sums, false); err != nil {
			return Choice{}, err
		}
	}
	ch.Score = sums.score()
	ch.AtBound = o.bounds(ch.Spec)
	return ch, nil
}

func contains(xs []float64, x float64) bool {
	for _, v := range xs {
		if v == x {
			return true
		}
	}
	return false
}

func nearest(xs []float64, x float64) float64 {
	best := xs[0]
	for _, v := range xs {
		if math.Abs(v-x) < math.Abs(best-x) {
			best = v
		}
	}
	return best
}

func (o ChooseOptions) oneFactor() bool {
	return len(o.SeasonLambdas) == 1 && o.SeasonLambdas[0] == 0
}

func (o ChooseOptions) withDefaults(series [][]float64) (ChooseOptions, error) {
	if math.IsNaN(o.Period) || o.Period < 0 || (o.Period > 0 && o.Period < 2) {
		return o, fmt.Errorf("period %v is not a number of buckets: use a period of at least 2, or 0 for none", o.Period)
	}
	if len(o.Degrees) == 0 {
		o.Degrees = []int{0, 1, 2}
	}
	if len(o.Harmonics) == 0 {
		o.Harmonics = []int{0}
		for k := 1; o.Period > 0 && k <= MaxHarmonics && float64(k) <= o.Period/2; k++ {
			o.Harmonics = append(o.Harmonics, k)
		}
	}
	if len(o.Lambdas) == 0 {
		o.Lambdas = ChoiceGrid()
	}
	if len(o.SeasonLambdas) == 0 {
		o.SeasonLambdas = ChoiceGrid()
	}
	for _, l := range o.Lambdas {
		if !(l > 0 && l <= 1) {
			return o, fmt.Errorf("lambda %v is outside (0, 1]: use a forgetting factor such as 0.95", l)
		}
	}
	for _, l := range o.SeasonLambdas {
		if !(l >= 0 && l <= 1) || l == 0 && !o.oneFactor() {
			return o, fmt.Errorf("seasonal lambda %v is outside (0, 1]: use a forgetting factor such as 0.99", l)
		}
	}
	sort.Float64s(o.Lambdas)
	sort.Float64s(o.SeasonLambdas)
	longest := 0
	for _, ys := range series {
		longest = max(longest, len(ys))
	}
	if o.Warmup == 0 {
		maxP := 0
		for _, d := range o.Degrees {
			for _, k := range o.Harmonics {
				s := Spec{Degree: d, Harmonics: k, Lambda: 1}
				if k > 0 {
					s.Period = o.Period
				}
				if s.Validate() == nil {
					maxP = max(maxP, s.Params())
				}
			}
		}
		// Warmup of the largest model tried (the period is the same).
		o.Warmup = max(3*maxP+o.BurnIn, int(math.Ceil(2*o.Period)))
		o.Warmup = min(o.Warmup, longest/3)
	}
	if o.Warmup < 0 {
		return o, fmt.Errorf("warm-up %d is negative: use 0 or more buckets", o.Warmup)
	}
	return o, nil
}

// bounds names the settings of s that sit on the first or last value they
// were allowed, where the search may have stopped short of the optimum.
func (o ChooseOptions) bounds(s Spec) []string {
	var out []string
	edge := func(name string, v float64, xs []float64, fmtv string) {
		if len(xs) < 2 {
			return // fixed by the caller, not searched
		}
		switch v {
		case xs[0]:
			out = append(out, fmt.Sprintf("%s at "+fmtv+", the bottom of its range", name, v))
		case xs[len(xs)-1]:
			out = append(out, fmt.Sprintf("%s at "+fmtv+", the top of its range", name, v))
		}
	}
	edge("lambda", s.Lambda, o.Lambdas, "%.4g")
	if s.Harmonics > 0 && !o.oneFactor() {
		edge("seasonal lambda", s.SeasonFactor(), o.SeasonLambdas, "%.4g")
	}
	if len(o.Degrees) > 1 && s.Degree == maxInt(o.Degrees) && s.Degree < MaxDegree {
		out = append(out, fmt.Sprintf("degree at %d, the top of its range", s.Degree))
	}
	if len(o.Harmonics) > 1 && s.Harmonics == maxInt(o.Harmonics) && s.Harmonics > 0 &&
		s.Harmonics < MaxHarmonics && float64(s.Harmonics+1) <= o.Period/2 {
		out = append(out, fmt.Sprintf("harmonics at %d, the top of its range", s.Harmonics))
	}
	return out
}

func maxInt(xs []int) int {
	m := xs[0]
	for _, x := range xs {
		m = max(m, x)
	}
	return m
}

// ModelText describes a spec for reports: "degree 1, 2 harmonics of 12,
// lambda 0.95, seasonal lambda 0.99".
func ModelText(s Spec) string {
	var b strings.Builder
	fmt.Fprintf(&b, "degree %d", s.Degree)
	if s.Harmonics > 0 {
		fmt.Fprintf(&b, ", %d harmonics of %v", s.Harmonics, s.Period)
	}
	fmt.Fprintf(&b, ", lambda %.4g", s.Lambda)
	if c := s.Canonical(); c.SeasonLambda != 0 {
		fmt.Fprintf(&b, ", seasonal lambda %.4g", c.SeasonLambda)
	}
	return b.String()
}

// Pooled scores each series with its own model (specs[i] for series[i])
// from bucket from on, and pools the one-step errors: the score of the
// models in use, on the buckets Choose scores with the same Warmup.
func Pooled(specs []Spec, series [][]float64, from int) (Score, error) {
	var sums scoreSums
	for i, ys := range series {
		if _, err := oneStep(specs[i], ys, from, &sums, true); err != nil {
			return Score{}, err
		}
	}
	return sums.score(), nil
}

// LambdaGrid is the grid of forgetting factors that o describes (evenly
// spaced in log effective memory; zero fields take SearchLambda's
// defaults).
func LambdaGrid(o SearchOptions) ([]float64, error) {
	o, err := o.withDefaults()
	if err != nil {
		return nil, err
	}
	return grid(o), nil
}
