package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/urfave/cli/v2"
)

// runForecast runs `sidetrend forecast args...` through an app that has
// only the forecast command, and returns standard output and error.
func runForecast(t *testing.T, args ...string) (stdout, stderr string, err error) {
	t.Helper()
	var out, errOut bytes.Buffer
	app := &cli.App{
		Name:           "sidetrend",
		Commands:       []*cli.Command{forecastCommand()},
		Writer:         &out,
		ErrWriter:      &errOut,
		ExitErrHandler: func(*cli.Context, error) {},
	}
	err = app.RunContext(context.Background(), append([]string{"sidetrend", "forecast"}, args...))
	return out.String(), errOut.String(), err
}

// writeFile writes a CSV into the test's directory and returns its path.
func writeFile(t *testing.T, name, body string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), name)
	if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

func readCSVOutput(t *testing.T, out string) [][]string {
	t.Helper()
	recs, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	if err != nil {
		t.Fatalf("output is not CSV: %v\n%s", err, out)
	}
	return recs
}

func parseNum(t *testing.T, s string) float64 {
	t.Helper()
	v, err := strconv.ParseFloat(s, 64)
	if err != nil {
		t.Fatalf("%q is not a number: %v", s, err)
	}
	return v
}

// TestForecastBakeryCSV runs the bundled example and checks the contract's
// columns, the row count and the bucket times.
func TestForecastBakeryCSV(t *testing.T) {
	t.Parallel()
	out, stderr, err := runForecast(t, "--csv", "../../examples/bakery.csv", "--time-col", "date", "--key-col", "branch",
		"--value-col", "takings", "--period", "7", "--harmonics", "2", "--format", "csv")
	if err != nil {
		t.Fatalf("forecast: %v\n%s", err, stderr)
	}
	recs := readCSVOutput(t, out)
	if !slices.Equal(recs[0], forecastColumns) {
		t.Fatalf("header %v, want %v", recs[0], forecastColumns)
	}
	// gen_bakery.go writes three branches; the default horizon is 12.
	if got := len(recs) - 1; got != 3*12 {
		t.Fatalf("%d rows, want 36", got)
	}
	// The newest day in the file is 2026-01-30 (gen_bakery.go: 180 days
	// from 2025-08-04), so the first forecast is for 2026-01-31, UTC.
	first := recs[1]
	if first[0] != "harbourside" || first[1] != "1" || first[2] != "2026-01-31T00:00:00Z" || first[11] != "2026-01-30T00:00:00Z" {
		t.Errorf("first row %v", first)
	}
	for _, r := range recs[1:] {
		lower95, forecast, upper95 := parseNum(t, r[6]), parseNum(t, r[3]), parseNum(t, r[7])
		if !(lower95 < forecast && forecast < upper95) {
			t.Errorf("row %v: forecast outside its 95%% interval", r)
		}
	}
}

// TestForecastMatchesEstimator checks that the command buckets the rows as
// the calendar says (several rows per bucket, times with and without an
// offset, an empty bucket) and that its forecasts equal the estimator's,
// fitted directly on the bucket values written out by hand.
func TestForecastMatchesEstimator(t *testing.T) {
	t.Parallel()
	// Daily buckets in Berlin. Row times: an RFC 3339 instant 23:30 UTC in
	// winter is 00:30 of the next local day; wall times are local.
	body := "key,time,value\n" +
		"a,2026-01-05 09:00:00,10\n" +
		"a,2026-01-05T23:30:00Z,4\n" + // local 2026-01-06 00:30
		"a,2026-01-06 12:00:00,5\n" +
		"a,2026-01-07,7.5\n" +
		"a,2026-01-07T10:00:00+01:00,0.5\n" +
		// 2026-01-08 has no row: an empty bucket
		"a,2026-01-09 08:00:00,12\n" +
		"a,2026-01-10 08:00:00,11\n" +
		"a,2026-01-11 08:00:00,14\n" +
		"b,2026-01-09,3\n" +
		"b,2026-01-10,4\n" +
		"b,2026-01-11,6\n" +
		"b,2026-01-11 18:00:00,-1\n"
	path := writeFile(t, "rows.csv", body)
	spec := estimator.Spec{Degree: 1, Lambda: 0.9}
	// Bucket sums per local day, by hand from the rows above.
	want := map[string][]float64{
		"a": {10, 4 + 5, 7.5 + 0.5, 0, 12, 11, 14},
		"b": {3, 4, 6 - 1},
	}
	asOf := "2026-01-11T00:00:00+01:00"
	for _, empty := range []string{"zero", "gap"} {
		out, stderr, err := runForecast(t, "--csv", path, "--tz", "Europe/Berlin", "--lambda", "0.9", "--horizon", "3",
			"--empty", empty, "--format", "csv")
		if err != nil {
			t.Fatalf("forecast: %v\n%s", err, stderr)
		}
		recs := readCSVOutput(t, out)[1:]
		for key, ys := range want {
			ys = slices.Clone(ys)
			if key == "a" && empty == "gap" {
				ys[3] = math.NaN()
			}
			st, err := estimator.Fit(spec, ys)
			if err != nil {
				t.Fatal(err)
			}
			fc, err := st.Forecast(3)
			if err != nil {
				t.Fatal(err)
			}
			var rows [][]string
			for _, r := range recs {
				if r[0] == key {
					rows = append(rows, r)
				}
			}
			if len(rows) != 3 {
				t.Fatalf("empty=%s series %s: %d rows, want 3", empty, key, len(rows))
			}
			for l, r := range rows {
				// The CSV prints the shortest text that reads back as the
				// same float64, so the values compare exactly.
				if got := parseNum(t, r[3]); got != fc.Forecast[l] {
					t.Errorf("empty=%s series %s h=%d: forecast %v, estimator %v", empty, key, l+1, got, fc.Forecast[l])
				}
				if got := parseNum(t, r[8]); got != fc.CumForecast[l] {
					t.Errorf("empty=%s series %s h=%d: cum_forecast %v, estimator %v", empty, key, l+1, got, fc.CumForecast[l])
				}
				if r[7] != "" && parseNum(t, r[7]) != fc.Upper95[l] {
					t.Errorf("empty=%s series %s h=%d: upper95 %s, estimator %v", empty, key, l+1, r[7], fc.Upper95[l])
				}
				if r[11] != asOf {
					t.Errorf("series %s: as_of %s, want %s", key, r[11], asOf)
				}
				wantStart := time.Date(2026, 1, 12+l, 0, 0, 0, 0, time.FixedZone("CET", 3600)).Format(time.RFC3339)
				if r[2] != wantStart {
					t.Errorf("series %s h=%d: period_start %s, want %s", key, l+1, r[2], wantStart)
				}
			}
		}
	}

	// Without --lambda, lambda is chosen per series exactly as
	// estimator.Choose does with the degree fixed.
	out, stderr, err := runForecast(t, "--csv", path, "--tz", "Europe/Berlin", "--horizon", "1", "--format", "csv")
	if err != nil {
		t.Fatalf("forecast without --lambda: %v\n%s", err, stderr)
	}
	res, err := estimator.Choose([][]float64{want["a"]}, estimator.ChooseOptions{Degrees: []int{spec.Degree}})
	if err != nil {
		t.Fatal(err)
	}
	auto := res.Spec
	st, err := estimator.Fit(auto, want["a"])
	if err != nil {
		t.Fatal(err)
	}
	fc, err := st.Forecast(1)
	if err != nil {
		t.Fatal(err)
	}
	recs := readCSVOutput(t, out)
	if recs[1][0] != "a" || parseNum(t, recs[1][3]) != fc.Forecast[0] {
		t.Errorf("lambda chosen from the data: row %v, estimator forecast %v (%v)", recs[1], fc.Forecast[0], res.Spec)
	}
}

// TestForecastJSONAndNotReady checks the JSON columns, null for interval
// bounds that are not defined yet, and the message for a series with too
// few points.
func TestForecastJSONAndNotReady(t *testing.T) {
	t.Parallel()
	// Series "two" has 2 points: a linear trend (p = 2) is fitted, but with
	// lambda 0.95 the weight T = 1 + 0.95 is below p, so there is no
	// residual variance and no interval. Series "one" has a single point.
	body := "time,value,key\n2026-02-01,5,two\n2026-02-02,7,two\n2026-02-01,3,one\n"
	out, stderr, err := runForecast(t, "--csv", writeFile(t, "few.csv", body), "--lambda", "0.95", "--format", "json", "--horizon", "2")
	if err != nil {
		t.Fatalf("forecast: %v\n%s", err, stderr)
	}
	if !strings.Contains(stderr, `series "one": only 1 points, needs 2`) {
		t.Errorf("stderr %q does not say series one is too short", stderr)
	}
	var rows []map[string]any
	if err := json.Unmarshal([]byte(out), &rows); err != nil {
		t.Fatalf("output is not JSON: %v\n%s", err, out)
	}
	if len(rows) != 2 {
		t.Fatalf("%d rows, want 2 (series two, horizon 2)", len(rows))
	}
	for _, r := range rows {
		var keys []string
		for k := range r {
			keys = append(keys, k)
		}
		slices.Sort(keys)
		wantKeys := slices.Sorted(slices.Values(forecastColumns))
		if !slices.Equal(keys, wantKeys) {
			t.Errorf("row keys %v, want %v", keys, wantKeys)
		}
		for _, k := range []string{"lower80", "upper80", "lower95", "upper95", "cum_lower95", "cum_upper95"} {
			if r[k] != nil {
				t.Errorf("%s = %v, want null while T <= p", k, r[k])
			}
		}
		// A line through (0, 5) and (1, 7) goes on with slope 2: 9, then 11.
		h := r["horizon"].(float64)
		if y := r["forecast"].(float64); math.Abs(y-(7+2*h)) > 1e-9 {
			t.Errorf("horizon %v: forecast %v, want %v", h, y, 7+2*h)
		}
	}
	// CSV prints undefined bounds as empty fields.
	out, _, err = runForecast(t, "--csv", writeFile(t, "few.csv", body), "--lambda", "0.95", "--format", "csv", "--horizon", "1")
	if err != nil {
		t.Fatal(err)
	}
	if r := readCSVOutput(t, out)[1]; r[4] != "" || r[7] != "" || r[3] == "" {
		t.Errorf("csv row %v: want empty bounds and a forecast", r)
	}
}

// TestForecastTable checks the readable output and its closing caution.
func TestForecastTable(t *testing.T) {
	t.Parallel()
	out, _, err := runForecast(t, "--csv", "../../examples/bakery.csv", "--time-col", "date", "--key-col", "branch",
		"--value-col", "takings", "--horizon", "3")
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimRight(out, "\n"), "\n")
	if lines[len(lines)-1] != forecastCaution {
		t.Errorf("last line %q, want the caution", lines[len(lines)-1])
	}
	for _, want := range []string{`series "harbourside": 180 buckets of 1 day in UTC up to 2026-01-30T00:00:00Z`, "period start", "2026-02-02T00:00:00Z"} {
		if !strings.Contains(out, want) {
			t.Errorf("table does not contain %q:\n%s", want, out)
		}
	}
	// The header: steps ahead, the bucket, the fan of bounds around the
	// forecast (95 % outside, 80 % inside), a bar, then the running totals;
	// every row has its numbers in that order and the bar in its column.
	var header string
	for i, l := range lines {
		if strings.HasPrefix(l, "series ") {
			header = lines[i+1]
			row := strings.Fields(lines[i+2])
			if len(row) != len(forecastTableHeader) || row[0] != "1" || row[7] != "|" {
				t.Fatalf("first row %q, want %d fields with the bar in column 8", lines[i+2], len(forecastTableHeader))
			}
			var v [10]float64
			for j, k := range []int{2, 3, 4, 5, 6, 8, 9, 10} {
				v[j] = parseNum(t, row[k])
			}
			if !(v[0] < v[1] && v[1] < v[2] && v[2] < v[3] && v[3] < v[4]) {
				t.Errorf("row %v: bounds are not a fan lower95 < lower80 < forecast < upper80 < upper95", row)
			}
			if !(v[5] < v[6] && v[6] < v[7]) || v[6] != v[2] {
				t.Errorf("row %v: cumulative columns are not cum_lower95 < cum_forecast < cum_upper95 with cum_forecast = forecast at step 1", row)
			}
			break
		}
	}
	if got := strings.Fields(header); !slices.Equal(got, []string{"ahead", "period", "start", "lower95", "lower80", "forecast", "upper80", "upper95",
		"|", "cum_lower95", "cum_forecast", "cum_upper95"}) {
		t.Errorf("header %q", header)
	}
	if header != strings.ToLower(header) {
		t.Errorf("header %q is not lower case", header)
	}
}

// TestForecastBadInput checks that bad input is an error that says what to
// change, with the line number for a bad row.
func TestForecastBadInput(t *testing.T) {
	t.Parallel()
	good := "time,value\n2026-01-01,1\n2026-01-02,2\n2026-01-03,3\n"
	cases := []struct {
		name, body string
		args       []string
		want       []string
	}{
		{"missing time column", "when,value\n2026-01-01,1\n", nil, []string{`no column "time"`, "when, value", "--time-col"}},
		{"missing value column", "time,amount\n2026-01-01,1\n", nil, []string{`no column "value"`, "--value-col"}},
		{"missing key column", good, []string{"--key-col", "shop"}, []string{`no column "shop"`, "--key-col"}},
		{"bad time", "time,value\n2026-01-01,1\n2026-13-01,2\n", nil, []string{"line 3", `"2026-13-01"`, "RFC 3339"}},
		{"bad value", "time,value\n2026-01-01,1\n2026-01-02,1\n2026-01-03,\"1,5\"\n", nil, []string{"line 4", `"1,5"`, "a dot for decimals"}},
		{"empty time", "time,value\n,1\n", nil, []string{"line 2", "give every row a time"}},
		{"short row", "time,value\n2026-01-01\n", nil, []string{"line 2", "has 1 fields"}},
		{"empty file", "", nil, []string{"is empty", "header row"}},
		{"no rows", "time,value\n", nil, []string{"no rows"}},
		{"bad bucket", good, []string{"--bucket", "1 day 2 hours"}, []string{"--bucket", "'26 hours'"}},
		{"quarter", good, []string{"--bucket", "1 quarter"}, []string{"write '3 months'"}},
		{"bad zone", good, []string{"--tz", "CET"}, []string{"--tz", "Europe/Berlin"}},
		{"bad agg", good, []string{"--agg", "median"}, []string{"--agg", "sum, mean"}},
		{"bad empty", good, []string{"--empty", "skip"}, []string{"--empty", "zero", "gap"}},
		{"bad lambda", good, []string{"--lambda", "high"}, []string{"--lambda", "0.95", "leave --lambda out"}},
		{"lambda auto is gone", good, []string{"--lambda", "auto"}, []string{`--lambda "auto" is not a number`, "leave --lambda out"}},
		{"lambda out of range", good, []string{"--lambda", "1.3"}, []string{"lambda 1.3", "(0, 1]"}},
		{"harmonics without period", good, []string{"--harmonics", "2"}, []string{"--harmonics 2 needs --period"}},
		{"bad format", good, []string{"--format", "xml"}, []string{"--format", "table, csv or json"}},
		{"bad horizon", good, []string{"--horizon", "0"}, []string{"--horizon", "1 to"}},
	}
	for _, c := range cases {
		path := writeFile(t, "in.csv", c.body)
		_, _, err := runForecast(t, append([]string{"--csv", path}, c.args...)...)
		if err == nil {
			t.Errorf("%s: no error", c.name)
			continue
		}
		for _, w := range c.want {
			if !strings.Contains(err.Error(), w) {
				t.Errorf("%s: error %q does not contain %q", c.name, err, w)
			}
		}
	}
	if _, _, err := runForecast(t, "--csv", filepath.Join(t.TempDir(), "nope.csv")); err == nil || !strings.Contains(err.Error(), "no such file") {
		t.Errorf("missing file: %v", err)
	}
}
