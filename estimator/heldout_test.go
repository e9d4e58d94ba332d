package estimator

import (
	"math"
	"path/filepath"
	"testing"
)

// heldOutCase is a dataset split in the "honest" way: everything is
// chosen on the first two thirds (Choose with its defaults, the period the
// only thing given), then one-step forecasts of the last third are scored
// with the model fixed and the state running on.
type heldOutCase struct {
	name   string
	file   string
	log    bool
	period float64
}

var heldOutCases = []heldOutCase{
	{"co2", "co2", false, 12},
	{"log_airpassengers", "airpassengers", true, 12},
	{"nile", "nile", false, 0},
	{"airpassengers", "airpassengers", false, 12},
	{"co2_gaps", "co2_gaps", false, 12},
	{"nile_gaps", "nile_gaps", false, 0},
	{"sunspots", "sunspots", false, 0},
}

func (c heldOutCase) series(t *testing.T) []float64 {
	ys := readSeries(t, c.file)
	if c.log {
		for i := range ys {
			ys[i] = math.Log(ys[i])
		}
	}
	return ys
}

// heldOut chooses on the first 2/3 and scores the rest.
func heldOut(t *testing.T, c heldOutCase) (Choice, Score, []float64) {
	t.Helper()
	ys := c.series(t)
	nt := 2 * len(ys) / 3
	ch, err := Choose([][]float64{ys[:nt]}, ChooseOptions{Period: c.period})
	if err != nil {
		t.Fatal(err)
	}
	sc, all, err := OneStep(ch.Spec, ys, nt)
	if err != nil {
		t.Fatal(err)
	}
	if !all {
		t.Fatalf("%s: the chosen model could not forecast every held-out bucket", c.name)
	}
	return ch, sc, ys
}

// TestHeldOutTargets: the targets. R 4.2.2's HoltWinters, its
// parameters fit on the first two thirds and then fixed, one-step RMSE on
// the last third (testdata/holtwinters_reference.csv, made by
// testdata/gen/holtwinters.R; command in testdata/README.md): sidetrend's
// honest one-step RMSE must be at or below it on co2 and log AirPassengers,
// and the one-step intervals must cover 92-98 % (95 %) and 74-86 % (80 %)
// of the held-out actuals.
func TestHeldOutTargets(t *testing.T) {
	if testing.Short() {
		t.Skip("model choice over 21 structures: a few seconds")
	}
	rRMSE := map[string]float64{}
	for _, r := range readCSV(t, filepath.Join("..", "testdata", "holtwinters_reference.csv")) {
		rRMSE[r["dataset"]] = parseFloat(t, r["rmse"])
	}
	for _, c := range heldOutCases[:3] {
		t.Run(c.name, func(t *testing.T) {
			ch, sc, _ := heldOut(t, c)
			t.Logf("%s: %s; held-out one-step RMSE %.4g (R HoltWinters %.4g), coverage 80 %% %.3f, 95 %% %.3f over %d errors; at bound: %v",
				c.name, ModelText(ch.Spec), sc.RMSE, rRMSE[c.name], sc.Cov80, sc.Cov95, sc.N, ch.AtBound)
			if c.name == "nile" {
				return // reported, no target
			}
			if sc.RMSE > rRMSE[c.name] {
				t.Errorf("held-out RMSE %.4g above R HoltWinters' %.4g", sc.RMSE, rRMSE[c.name])
			}
			if sc.Cov95 < 0.92 || sc.Cov95 > 0.98 {
				t.Errorf("95 %% coverage %.3f outside 0.92-0.98", sc.Cov95)
			}
			if sc.Cov80 < 0.74 || sc.Cov80 > 0.86 {
				t.Errorf("80 %% coverage %.3f outside 0.74-0.86", sc.Cov80)
			}
			// The cumulative interval of 12-bucket sums (what a budget
			// reads), the same range where there are at least 100 windows
			// to judge by: co2 has 145; log AirPassengers has 37
			// overlapping windows (about three independent years), too
			// few for a coverage range, and is reported only (0.89 when
			// this was written).
			ys := c.series(t)
			_, cum, err := Ahead(ch.Spec, ys, 2*len(ys)/3, 12)
			if err != nil {
				t.Fatal(err)
			}
			t.Logf("%s: 12-bucket sums, 95 %% coverage %.3f over %d windows", c.name, cum.Cov95, cum.N)
			if cum.N >= 100 && (cum.Cov95 < 0.92 || cum.Cov95 > 0.98) {
				t.Errorf("12-bucket sums: 95 %% coverage %.3f outside 0.92-0.98 over %d windows", cum.Cov95, cum.N)
			}
		})
	}
}

// TestHeldOutHalfWidth: on every dataset in testdata, with the model
// chosen on the first two thirds, no 95 % one-step interval issued over
// the last third is wider (half-width) than 20 times the held-out one-step
// RMSE (the bound; the co2 interval it reported was 13 million
// times that). It also reports the coverage of the 12-bucket cumulative
// 95 % interval that budgets use (a check the issue asks for; with 145
// overlapping windows on co2 and 37 on AirPassengers it is a loose one).
func TestHeldOutHalfWidth(t *testing.T) {
	if testing.Short() {
		t.Skip("model choice over 21 structures: a few seconds")
	}
	for _, c := range heldOutCases {
		t.Run(c.name, func(t *testing.T) {
			ch, sc, ys := heldOut(t, c)
			nt := 2 * len(ys) / 3
			st, err := NewState(ch.Spec)
			if err != nil {
				t.Fatal(err)
			}
			worst := 0.0
			for i, y := range ys {
				if i >= nt-1 && st.Ready() {
					fc, err := st.Forecast(1)
					if err != nil {
						t.Fatal(err)
					}
					hw := (fc.Upper95[0] - fc.Lower95[0]) / 2
					if math.IsNaN(hw) {
						t.Fatalf("bucket %d: no 95 %% interval", i)
					}
					worst = math.Max(worst, hw)
				}
				if math.IsNaN(y) {
					err = st.Skip(1)
				} else {
					_, err = st.Observe(y)
				}
				if err != nil {
					t.Fatal(err)
				}
			}
			_, cum, err := Ahead(ch.Spec, ys, nt, 12)
			if err != nil {
				t.Fatal(err)
			}
			t.Logf("%s: %s; RMSE %.4g, widest 95 %% half-width %.3g (%.2f RMSE); coverage 80 %% %.3f, 95 %% %.3f; 12-bucket sums: 95 %% coverage %.3f over %d windows",
				c.name, ModelText(ch.Spec), sc.RMSE, worst, worst/sc.RMSE, sc.Cov80, sc.Cov95, cum.Cov95, cum.N)
			if worst > 20*sc.RMSE {
				t.Errorf("a 95 %% half-width of %.4g is %.1f times the held-out RMSE %.4g", worst, worst/sc.RMSE, sc.RMSE)
			}
		})
	}
}

// TestIntervalShortMemory: the settings the issue reported broken keep
// finite, sound intervals and slope t-values: co2 with a linear trend, 2
// harmonics and lambda 0.8385 (T - p about 0.2: a 95 % interval of +-4.66
// million before), and with 6 harmonics at lambda 0.5 (T - p negative: no
// interval at all before). Bound: 20 times the one-step RMSE of the fit
// itself (the bound for held-out data).
func TestIntervalShortMemory(t *testing.T) {
	ys := readSeries(t, "co2")
	for _, spec := range []Spec{
		{Degree: 1, Period: 12, Harmonics: 2, Lambda: 0.8385},
		{Degree: 1, Period: 12, Harmonics: 6, Lambda: 0.5},
		{Degree: 2, Period: 12, Harmonics: 6, Lambda: 0.5, SeasonLambda: 0.6},
	} {
		st, err := Fit(spec, ys)
		if err != nil {
			t.Fatal(err)
		}
		rmse := st.Errors().RMSE
		fc, err := st.Forecast(12)
		if err != nil {
			t.Fatal(err)
		}
		sl, err := st.Slope()
		if err != nil {
			t.Fatal(err)
		}
		hw := (fc.Upper95[0] - fc.Lower95[0]) / 2
		if !(hw > 0) || hw > 20*rmse || !finite(fc.CumUpper95[11]) || !finite(sl.T()) {
			t.Errorf("%v: 95 %% half-width %v (one-step RMSE %v), cumulative bound %v, slope t %v",
				spec, hw, rmse, fc.CumUpper95[11], sl.T())
		}
		t.Logf("%v: DF %.3g, 95 %% half-width %.3g, one-step RMSE %.3g, slope t %.3g", spec, fc.DF, hw, rmse, sl.T())
	}
}

// TestBacktestIsOneStep: Backtest scores the buckets after Warmup, the
// same errors OneStep and Choose score for that model.
func TestBacktestIsOneStep(t *testing.T) {
	ys := readSeries(t, "co2_gaps")
	spec := Spec{Degree: 1, Period: 12, Harmonics: 3, Lambda: 0.9, SeasonLambda: 0.98}
	es, err := Backtest(spec, ys)
	if err != nil {
		t.Fatal(err)
	}
	sc, _, err := OneStep(spec, ys, Warmup(spec))
	if err != nil {
		t.Fatal(err)
	}
	if es.N != sc.N || es.RMSE != sc.RMSE || es.MAE != sc.MAE || es.Cov95 != sc.Cov95 {
		t.Errorf("Backtest %+v, OneStep %+v", es, sc)
	}
}
