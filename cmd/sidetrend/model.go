package main

import (
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/urfave/cli/v2"
)

// modelFlags are the model settings of the offline commands: a setting
// given is fixed, one left out (nil) is chosen from the data by
// estimator.Choose.
type modelFlags struct {
	degree, harmonics    *int
	lambda, seasonLambda *float64
	period               float64
	burnIn               int
	transform            string // "" or "log"
}

// modelCLIFlags are the model flags forecast and backtest share (each
// declares --degree itself, with its own default).
func modelCLIFlags() []cli.Flag {
	return []cli.Flag{
		&cli.Float64Flag{Name: "period", Usage: "seasonal period in buckets (7 for weekly in days); 0 for none"},
		&cli.IntFlag{Name: "harmonics", Usage: "harmonic pairs for the season, 0 to 6, with --period; left out, chosen from the data"},
		&cli.StringFlag{Name: "lambda", Usage: "forgetting factor of the trend (and of the season without --season-lambda) in (0, 1]; left out, chosen from the data by one-step error"},
		&cli.StringFlag{Name: "season-lambda", Usage: "forgetting factor of the seasonal terms in (0, 1]; left out, chosen from the data"},
		&cli.StringFlag{Name: "transform", Usage: "log: fit the logarithms of the values (for a season that swings with the level); forecasts are transformed back"},
		&cli.IntFlag{Name: "burn-in", Usage: "points beyond the parameter count before a series gets forecasts"},
	}
}

func parseFactor(c *cli.Context, name string) (*float64, error) {
	if !c.IsSet(name) {
		return nil, nil
	}
	s := c.String(name)
	v, err := strconv.ParseFloat(strings.TrimSpace(s), 64)
	if err != nil {
		return nil, fmt.Errorf("--%s %q is not a number: give a forgetting factor such as 0.95, or leave --%s out to choose it from the data", name, s, name)
	}
	if !(v > 0 && v <= 1) {
		return nil, fmt.Errorf("--%s %v is outside (0, 1]: use a forgetting factor such as 0.95 (1 means no forgetting)", name, v)
	}
	return &v, nil
}

// modelFlagsFrom reads the model flags; degreeDefault, if not nil, is the
// degree when --degree is left out.
func modelFlagsFrom(c *cli.Context, degreeDefault *int) (modelFlags, error) {
	m := modelFlags{period: c.Float64("period"), burnIn: c.Int("burn-in"), transform: c.String("transform"), degree: degreeDefault}
	if c.IsSet("degree") {
		d := c.Int("degree")
		m.degree = &d
	}
	if c.IsSet("harmonics") {
		k := c.Int("harmonics")
		m.harmonics = &k
	}
	var err error
	if m.lambda, err = parseFactor(c, "lambda"); err != nil {
		return m, err
	}
	if m.seasonLambda, err = parseFactor(c, "season-lambda"); err != nil {
		return m, err
	}
	switch m.transform {
	case "", "none":
		m.transform = ""
	case "log":
	default:
		return m, fmt.Errorf("--transform %q is not known: use log, or leave it out", m.transform)
	}
	if math.IsNaN(m.period) || m.period < 0 || (m.period > 0 && m.period < 2) {
		return m, fmt.Errorf("--period %v is not a number of buckets: use a period of at least 2, or 0 for none", m.period)
	}
	if m.harmonics == nil && m.period == 0 {
		zero := 0 // no period: no harmonics to choose
		m.harmonics = &zero
	}
	if m.harmonics != nil && *m.harmonics > 0 && m.period == 0 {
		return m, fmt.Errorf("--harmonics %d needs --period: give the seasonal period in buckets", *m.harmonics)
	}
	if m.seasonLambda != nil && m.period == 0 {
		return m, fmt.Errorf("--season-lambda needs --period: give the seasonal period in buckets")
	}
	// A fully given model must be valid as it stands.
	if m.degree != nil && m.harmonics != nil && m.lambda != nil {
		if _, err := m.fixedSpec(); err != nil {
			return m, fmt.Errorf("model flags: %w", err)
		}
	}
	return m, nil
}

// fixedSpec is the model when every setting is given.
func (m modelFlags) fixedSpec() (estimator.Spec, error) {
	s := estimator.Spec{Degree: *m.degree, Harmonics: *m.harmonics, Lambda: *m.lambda, BurnIn: m.burnIn}
	if s.Harmonics > 0 {
		s.Period = m.period
	}
	if m.seasonLambda != nil {
		s.SeasonLambda = *m.seasonLambda
	}
	return s, s.Validate()
}

// transformIn applies the transform to a series' values in place; a value
// the transform cannot take is an error naming its bucket.
func (m modelFlags) transformIn(ys []float64, bucketName func(i int) string) error {
	if m.transform != "log" {
		return nil
	}
	for i, y := range ys {
		if math.IsNaN(y) {
			continue
		}
		if !(y > 0) {
			return fmt.Errorf("bucket %s has the value %v: --transform log needs positive values", bucketName(i), y)
		}
		ys[i] = math.Log(y)
	}
	return nil
}

// back maps a forecast or bound on the fitted scale back to the data's.
func (m modelFlags) back(x float64) float64 {
	if m.transform == "log" {
		return math.Exp(x)
	}
	return x
}

// choose returns the model for ys (already transformed): the given one, or
// the one Choose picks over ys with the given settings fixed.
func (m modelFlags) choose(ys []float64) (estimator.Spec, *estimator.Choice, error) {
	if m.degree != nil && m.harmonics != nil && m.lambda != nil && (m.seasonLambda != nil || *m.harmonics == 0) {
		s, err := m.fixedSpec()
		return s, nil, err
	}
	o := estimator.ChooseOptions{Period: m.period, BurnIn: m.burnIn}
	if m.degree != nil {
		o.Degrees = []int{*m.degree}
	}
	if m.harmonics != nil {
		o.Harmonics = []int{*m.harmonics}
	}
	if m.lambda != nil {
		o.Lambdas = []float64{*m.lambda}
		if m.seasonLambda == nil {
			// --lambda alone: one factor for both blocks, as before there
			// were two.
			o.SeasonLambdas = []float64{0}
		}
	}
	if m.seasonLambda != nil {
		o.SeasonLambdas = []float64{*m.seasonLambda}
	}
	ch, err := estimator.Choose([][]float64{ys}, o)
	if err != nil {
		return estimator.Spec{}, nil, err
	}
	return ch.Spec, &ch, nil
}

// modelText describes a model with its transform for the contract column
// model and for messages.
func (m modelFlags) modelText(s estimator.Spec) string {
	t := estimator.ModelText(s)
	if m.transform == "log" {
		t += ", log scale"
	}
	return t
}

// trimPartial leaves out a first or last bucket that the series' rows
// cover only in part: the rows start later in the first bucket, or end
// earlier in the last, than one and a half times their usual spacing (the
// median step between consecutive row times). It returns the first and
// last bucket kept and a note for each bucket left out.
func (s *csvSeries) trimPartial(start func(int64) time.Time) (lo, hi int64, notes []string) {
	lo, hi = s.lo, s.hi
	if len(s.times) < 3 || lo == hi {
		return lo, hi, nil
	}
	ts := append([]time.Time(nil), s.times...)
	sort.Slice(ts, func(i, j int) bool { return ts[i].Before(ts[j]) })
	var steps []time.Duration
	for i := 1; i < len(ts); i++ {
		if d := ts[i].Sub(ts[i-1]); d > 0 {
			steps = append(steps, d)
		}
	}
	if len(steps) == 0 {
		return lo, hi, nil
	}
	sort.Slice(steps, func(i, j int) bool { return steps[i] < steps[j] })
	step := steps[len(steps)/2]
	slack := step + step/2
	if late := ts[0].Sub(start(lo)); late > slack {
		notes = append(notes, fmt.Sprintf("series %s: the first bucket (%s) is only partly covered (rows from %s, usually every %v); left out",
			displayKey(s.key), start(lo).Format(time.RFC3339), ts[0].Format(time.RFC3339), step))
		lo++
	}
	if early := start(hi + 1).Sub(ts[len(ts)-1]); early > slack && hi > lo {
		notes = append(notes, fmt.Sprintf("series %s: the last bucket (%s) is only partly covered (rows up to %s, usually every %v); left out",
			displayKey(s.key), start(hi).Format(time.RFC3339), ts[len(ts)-1].Format(time.RFC3339), step))
		hi--
	}
	return lo, hi, notes
}
