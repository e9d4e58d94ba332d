package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/urfave/cli/v2"
)

func runCmd(t *testing.T, cmd *cli.Command, args ...string) (stdout, stderr string, err error) {
	t.Helper()
	var out, errOut bytes.Buffer
	app := &cli.App{
		Name:           "sidetrend",
		Commands:       []*cli.Command{cmd},
		Writer:         &out,
		ErrWriter:      &errOut,
		ExitErrHandler: func(*cli.Context, error) {},
	}
	err = app.RunContext(context.Background(), append([]string{"sidetrend", cmd.Name}, args...))
	return out.String(), errOut.String(), err
}

// monthlyCSV writes a testdata series (R's datasets, testdata/README.md) as
// monthly rows from first, one row per month on its first day.
func monthlyCSV(t *testing.T, name string, first time.Time) (string, []float64) {
	t.Helper()
	f, err := os.Open(filepath.Join("..", "..", "testdata", "series", name+".csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var b strings.Builder
	b.WriteString("time,value\n")
	var ys []float64
	for i, r := range recs[1:] {
		fmt.Fprintf(&b, "%s,%s\n", first.AddDate(0, i, 0).Format("2006-01-02"), r[1])
		ys = append(ys, parseNumOrNaN(r[1]))
	}
	return writeFile(t, name+".csv", b.String()), ys
}

func parseNumOrNaN(s string) float64 {
	var v float64
	if _, err := fmt.Sscan(s, &v); err != nil {
		return math.NaN()
	}
	return v
}

// TestBacktestCO2 holds out the last third of co2 (R's datasets::co2,
// monthly, testdata/series/co2.csv) and checks the contract columns and
// that the numbers are those of estimator.Choose on the first two thirds
// and estimator.Ahead over the rest, bit for bit.
func TestBacktestCO2(t *testing.T) {
	t.Parallel()
	path, ys := monthlyCSV(t, "co2", time.Date(1959, 1, 1, 0, 0, 0, 0, time.UTC))
	out, stderr, err := runCmd(t, backtestCommand(), "--csv", path, "--bucket", "1 month", "--agg", "mean",
		"--period", "12", "--holdout", "156", "--horizon", "2", "--format", "csv")
	if err != nil {
		t.Fatalf("backtest: %v\n%s", err, stderr)
	}
	recs := readCSVOutput(t, out)
	if got := strings.Join(recs[0], ","); got != strings.Join(backtestColumns, ",") {
		t.Fatalf("header %s, want %s", got, strings.Join(backtestColumns, ","))
	}
	if len(recs) != 3 {
		t.Fatalf("%d rows, want 2 horizons:\n%s", len(recs)-1, out)
	}
	ch, err := estimator.Choose([][]float64{ys[:312]}, estimator.ChooseOptions{Period: 12})
	if err != nil {
		t.Fatal(err)
	}
	want, _, err := estimator.Ahead(ch.Spec, ys, 312, 2)
	if err != nil {
		t.Fatal(err)
	}
	for h, r := range recs[1:] {
		w := want[h]
		if r[1] != fmt.Sprint(h+1) || r[2] != fmt.Sprint(w.N) || parseNum(t, r[3]) != w.RMSE || parseNum(t, r[4]) != w.MAE ||
			parseNum(t, r[5]) != w.Cov80 || parseNum(t, r[6]) != w.Cov95 || r[7] != estimator.ModelText(ch.Spec) {
			t.Errorf("row %v, want horizon %d n %d rmse %v mae %v coverage %v %v model %q", r, h+1, w.N, w.RMSE, w.MAE, w.Cov80, w.Cov95, estimator.ModelText(ch.Spec))
		}
	}
	// R 4.2.2 HoltWinters on the same split: one-step RMSE 0.31605
	// (testdata/holtwinters_reference.csv).
	if rmse := parseNum(t, recs[1][3]); rmse > 0.316053364454983 {
		t.Errorf("one-step RMSE %v above R HoltWinters' 0.31605", rmse)
	}
}

// TestBacktestFlags: a fraction as holdout, fixed flags kept, the log scale
// and its refusal of non-positive values, and a bad holdout.
func TestBacktestFlags(t *testing.T) {
	t.Parallel()
	path, _ := monthlyCSV(t, "airpassengers", time.Date(1949, 1, 1, 0, 0, 0, 0, time.UTC))
	out, stderr, err := runCmd(t, backtestCommand(), "--csv", path, "--bucket", "1 month", "--period", "12",
		"--holdout", "0.25", "--degree", "1", "--harmonics", "3", "--transform", "log", "--format", "csv")
	if err != nil {
		t.Fatalf("backtest: %v\n%s", err, stderr)
	}
	recs := readCSVOutput(t, out)
	if len(recs) != 2 || recs[1][2] != "36" || !strings.HasPrefix(recs[1][7], "degree 1, 3 harmonics of 12, lambda") ||
		!strings.HasSuffix(recs[1][7], ", log scale") {
		t.Errorf("output:\n%s", out)
	}
	bad := writeFile(t, "bad.csv", "time,value\n2026-01-01,3\n2026-01-02,0\n2026-01-03,4\n")
	if _, _, err := runCmd(t, backtestCommand(), "--csv", bad, "--holdout", "1", "--transform", "log"); err == nil ||
		!strings.Contains(err.Error(), "--transform log needs positive values") {
		t.Errorf("a zero with --transform log: err = %v", err)
	}
	for _, h := range []string{"0", "-2", "1.5", "x"} {
		if _, _, err := runCmd(t, backtestCommand(), "--csv", bad, "--holdout", h); err == nil || !strings.Contains(err.Error(), "--holdout") {
			t.Errorf("--holdout %s: err = %v", h, err)
		}
	}
}

// TestPartialBuckets: hourly readings in daily buckets whose first day
// starts at 13:00 and whose last day ends at 10:00. Both days are left
// out, with a note, and the forecast starts after the last full day.
func TestPartialBuckets(t *testing.T) {
	t.Parallel()
	var b strings.Builder
	b.WriteString("time,value\n")
	start := time.Date(2026, 3, 1, 13, 0, 0, 0, time.UTC)
	end := time.Date(2026, 3, 20, 10, 0, 0, 0, time.UTC)
	for at, i := start, 0; !at.After(end); at, i = at.Add(time.Hour), i+1 {
		fmt.Fprintf(&b, "%s,%d\n", at.Format(time.RFC3339), 10+i%5)
	}
	path := writeFile(t, "hourly.csv", b.String())
	out, stderr, err := runCmd(t, forecastCommand(), "--csv", path, "--agg", "sum", "--lambda", "0.9", "--horizon", "1", "--format", "csv")
	if err != nil {
		t.Fatalf("forecast: %v\n%s", err, stderr)
	}
	for _, want := range []string{"the first bucket (2026-03-01T00:00:00Z) is only partly covered", "the last bucket (2026-03-20T00:00:00Z) is only partly covered"} {
		if !strings.Contains(stderr, want) {
			t.Errorf("stderr does not say %q:\n%s", want, stderr)
		}
	}
	recs := readCSVOutput(t, out)
	if len(recs) != 2 || recs[1][2] != "2026-03-20T00:00:00Z" || recs[1][11] != "2026-03-19T00:00:00Z" {
		t.Errorf("forecast rows %v: want period_start 2026-03-20 as of 2026-03-19", recs)
	}
}
