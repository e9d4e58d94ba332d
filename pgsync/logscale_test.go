package pgsync

import (
	"context"
	"encoding/csv"
	"math"
	"os"
	"strconv"
	"strings"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
)

// airPassengers reads testdata/series/airpassengers.csv (R's
// datasets::AirPassengers, testdata/README.md).
func airPassengers(t *testing.T) []float64 {
	t.Helper()
	f, err := os.Open("../testdata/series/airpassengers.csv")
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var ys []float64
	for _, r := range recs[1:] {
		y, err := strconv.ParseFloat(r[1], 64)
		if err != nil {
			t.Fatal(err)
		}
		ys = append(ys, y)
	}
	return ys
}

// logSpec is the model of the log trackers below.
var logSpec = estimator.Spec{Degree: 1, Period: 12, Harmonics: 3, Lambda: 0.95}

// TestLogScaleForecasts: a tracker with transform log over AirPassengers in
// monthly buckets serves what an offline fit of the estimator on the
// natural logs of the same 144 values gives, transformed back: forecast
// exp(log forecast), bounds exp(log forecast -+ t se), cumulative forecast
// the sum of those, cumulative bounds NULL. One month's value is set to 0:
// capture rejects that row, and its month is a gap (NaN in the offline
// fit). forecast_history and accuracy_by_horizon form the
// same bounds.
func TestLogScaleForecasts(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	ys := airPassengers(t)
	const zeroAt = 100 // month 101 (1957-05) set to 0
	exec(t, pool, `CREATE TABLE air (month date, passengers float8)`)
	exec(t, pool, `INSERT INTO air SELECT date '1949-01-01' + (i - 1) * interval '1 month',
		CASE WHEN i - 1 = $2 THEN 0 ELSE v END
		FROM unnest($1::float8[]) WITH ORDINALITY AS u(v, i)`, ys, zeroAt)
	exec(t, pool, `SELECT sidetrend.track('air', 'month', 'passengers', bucket => '1 month', agg => 'sum',
		degree => 1, period => 12, harmonics => 3, lambda => 0.95, horizon => 12, transform => 'log')`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}

	logs := make([]float64, len(ys))
	for i, y := range ys {
		logs[i] = math.Log(y)
	}
	logs[zeroAt] = math.NaN()
	st, err := estimator.Fit(logSpec, logs)
	if err != nil {
		t.Fatal(err)
	}
	want, err := st.Forecast(12)
	if err != nil {
		t.Fatal(err)
	}

	// The zero row is a reject at capture (0 has no logarithm), so its
	// month holds no rows: a gap.
	var reason, empty string
	if err := pool.QueryRow(ctx, `SELECT r.reason, t.empty FROM sidetrend.rejects r
		JOIN sidetrend.trackers t ON t.id = r.tracker_id WHERE t.name = 'air'`).Scan(&reason, &empty); err != nil {
		t.Fatal(err)
	}
	if reason != "value is not positive (the tracker fits logarithms)" || empty != "gap" {
		t.Errorf("reject %q, empty %q; want the zero row rejected and empty buckets as gaps", reason, empty)
	}

	rows, err := pool.Query(ctx, `SELECT horizon, forecast, lower80, upper80, lower95, upper95, cum_forecast,
		cum_lower95 IS NULL AND cum_upper95 IS NULL FROM sidetrend.forecasts WHERE tracker = 'air' ORDER BY horizon`)
	if err != nil {
		t.Fatal(err)
	}
	defer rows.Close()
	// Each value passes through exp in Go and ln and exp in Postgres: a
	// few units in the last place.
	const tol = 1e-12
	n := 0
	var cum float64
	for rows.Next() {
		var h int
		var f, lower80, upper80, lower95, upper95, cf float64
		var cumNull bool
		if err := rows.Scan(&h, &f, &lower80, &upper80, &lower95, &upper95, &cf, &cumNull); err != nil {
			t.Fatal(err)
		}
		i := h - 1
		lf, se := want.Forecast[i], want.SE[i]
		cum += math.Exp(lf)
		for _, c := range []struct {
			name      string
			got, want float64
		}{
			{"forecast", f, math.Exp(lf)},
			{"lower80", lower80, math.Exp(lf - want.T80*se)},
			{"upper80", upper80, math.Exp(lf + want.T80*se)},
			{"lower95", lower95, math.Exp(lf - want.T95*se)},
			{"upper95", upper95, math.Exp(lf + want.T95*se)},
			{"cum_forecast", cf, cum},
		} {
			if !scalar.EqualWithinAbsOrRel(c.got, c.want, 0, tol) {
				t.Errorf("horizon %d %s = %v, want %v (offline fit on the logs)", h, c.name, c.got, c.want)
			}
		}
		if !cumNull {
			t.Errorf("horizon %d: cumulative bounds should be NULL on the log scale", h)
		}
		n++
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if n != 12 {
		t.Fatalf("%d forecast rows, want 12", n)
	}

	// The history served at the newest bucket, the same bounds.
	var hf, hlo, hhi float64
	if err := pool.QueryRow(ctx, `SELECT forecast, lower95, upper95 FROM sidetrend.forecast_history
		WHERE tracker = 'air' AND horizon = 1 ORDER BY issued_for DESC LIMIT 1`).Scan(&hf, &hlo, &hhi); err != nil {
		t.Fatal(err)
	}
	lf, se := want.Forecast[0], want.SE[0]
	if !scalar.EqualWithinAbsOrRel(hf, math.Exp(lf), 0, tol) || !scalar.EqualWithinAbsOrRel(hlo, math.Exp(lf-want.T95*se), 0, tol) ||
		!scalar.EqualWithinAbsOrRel(hhi, math.Exp(lf+want.T95*se), 0, tol) {
		t.Errorf("history: %v [%v, %v], want %v [%v, %v]", hf, hlo, hhi, math.Exp(lf), math.Exp(lf-want.T95*se), math.Exp(lf+want.T95*se))
	}
	// Bounds on the value scale hold their values: at least the plain
	// bound check that every 95 % interval contains its forecast and is
	// positive.
	var bad int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.forecast_history
		WHERE tracker = 'air' AND NOT (lower95 > 0 AND lower95 < forecast AND forecast < upper95)`).Scan(&bad); err != nil {
		t.Fatal(err)
	}
	if bad != 0 {
		t.Errorf("%d served forecasts whose 95 %% interval is not positive around the forecast", bad)
	}
}

// TestLogScaleSettings: transform is checked by track and alter_tracker;
// switching a tracker to the log scale replays its series on the logs and
// deletes the forecasts it served on the old scale.
func TestLogScaleSettings(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (at timestamptz, v float8)`)
	for _, c := range []struct{ sql, state, text string }{
		{`SELECT sidetrend.track('obs', 'at', 'v', transform => 'sqrt')`, "22023", `transform => "sqrt" is not known`},
		{`SELECT sidetrend.track('obs', 'at', 'v', transform => 'log', empty => 'zero')`, "22023", "0 has no logarithm"},
	} {
		_, err := pool.Exec(ctx, c.sql)
		wantSQLState(t, c.sql, err, c.state, c.text)
	}
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', degree => 1, lambda => 0.9, horizon => 3)`)
	exec(t, pool, `INSERT INTO obs SELECT '2026-01-01Z'::timestamptz + d * interval '1 day', 10 * exp(0.05 * d) * (1 + 0.02 * (d % 3 - 1))
		FROM generate_series(0, 29) d`)
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	_, err := pool.Exec(ctx, `SELECT sidetrend.alter_tracker('obs', transform => 'cube')`)
	wantSQLState(t, "alter to an unknown transform", err, "22023", `transform => "cube" is not known`)
	var msg string
	if err := pool.QueryRow(ctx, `SELECT sidetrend.alter_tracker('obs', transform => 'log')`).Scan(&msg); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(msg, "transform none -> log") || !strings.Contains(msg, "the source was read again") || !strings.Contains(msg, "were deleted") {
		t.Errorf("alter says %q", msg)
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	ys := make([]float64, 30)
	if err := pool.QueryRow(ctx, `SELECT array_agg(ln(value) ORDER BY bucket) FROM sidetrend.actuals WHERE tracker = 'obs'`).Scan(&ys); err != nil {
		t.Fatal(err)
	}
	st, err := estimator.Fit(estimator.Spec{Degree: 1, Lambda: 0.9}, ys)
	if err != nil {
		t.Fatal(err)
	}
	want, err := st.Forecast(3)
	if err != nil {
		t.Fatal(err)
	}
	var f float64
	var transform string
	if err := pool.QueryRow(ctx, `SELECT f.forecast, s.transform FROM sidetrend.forecasts f
		JOIN sidetrend.tracker_settings s USING (tracker) WHERE f.tracker = 'obs' AND f.horizon = 3`).Scan(&f, &transform); err != nil {
		t.Fatal(err)
	}
	// exp of the offline fit's log forecast (estimator.Fit on ln of the
	// bucket values), one rounding in Go.
	if transform != "log" || !scalar.EqualWithinAbsOrRel(f, math.Exp(want.Forecast[2]), 0, 1e-13) {
		t.Errorf("after the switch: transform %q, forecast %v, want log and %v", transform, f, math.Exp(want.Forecast[2]))
	}
}

// TestComponents: sidetrend.components against the estimator's theta on
// the log AirPassengers tracker (degree 1, 3 harmonics of 12): level and
// slope are theta_1 and theta_2, and the effect at phase k is the seasonal
// part of f(j)^T theta (estimator.Spec.Regressors) at j = -((N - k) mod 12),
// N the newest bucket. At N's own phase level + effect is the fit at N.
// A tracker without a season has one row, phase and effect NULL.
func TestComponents(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	ys := airPassengers(t)
	exec(t, pool, `CREATE TABLE air (month date, passengers float8)`)
	exec(t, pool, `INSERT INTO air SELECT date '1949-01-01' + (i - 1) * interval '1 month', v
		FROM unnest($1::float8[]) WITH ORDINALITY AS u(v, i)`, ys)
	exec(t, pool, `SELECT sidetrend.track('air', 'month', 'passengers', bucket => '1 month', agg => 'sum',
		degree => 1, period => 12, harmonics => 3, lambda => 0.95, horizon => 12, transform => 'log')`)
	exec(t, pool, `SELECT sidetrend.track('air', 'month', 'passengers', bucket => '1 month', agg => 'sum',
		degree => 1, lambda => 0.9, horizon => 2, name => 'plain')`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	logs := make([]float64, len(ys))
	for i, y := range ys {
		logs[i] = math.Log(y)
	}
	st, err := estimator.Fit(logSpec, logs)
	if err != nil {
		t.Fatal(err)
	}
	theta, err := st.Theta()
	if err != nil {
		t.Fatal(err)
	}
	var newest int64
	if err := pool.QueryRow(ctx, `SELECT s.folded_through FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id
		WHERE t.name = 'air'`).Scan(&newest); err != nil {
		t.Fatal(err)
	}
	rows, err := pool.Query(ctx, `SELECT phase, level, slope, effect, scale, last_start = as_of
		FROM sidetrend.components WHERE tracker = 'air' ORDER BY phase`)
	if err != nil {
		t.Fatal(err)
	}
	defer rows.Close()
	const tol = 1e-12 // theta stored as float8; the SQL sums its own sines and cosines
	f := make([]float64, logSpec.Params())
	n := 0
	for rows.Next() {
		var phase int
		var level, slope, effect float64
		var scale string
		var atNewest bool
		if err := rows.Scan(&phase, &level, &slope, &effect, &scale, &atNewest); err != nil {
			t.Fatal(err)
		}
		back := ((newest-int64(phase))%12 + 12) % 12
		logSpec.Regressors(-float64(back), f)
		var want float64
		for i := logSpec.Degree + 1; i < len(f); i++ {
			want += f[i] * theta[i]
		}
		if !scalar.EqualWithinAbsOrRel(level, theta[0], 0, tol) || !scalar.EqualWithinAbsOrRel(slope, theta[1], 0, tol) {
			t.Errorf("phase %d: level %v slope %v, want theta %v %v", phase, level, slope, theta[0], theta[1])
		}
		if !scalar.EqualWithinAbsOrRel(effect, want, 1e-14, tol) {
			t.Errorf("phase %d: effect %v, want %v (seasonal part of f(-%d)^T theta)", phase, effect, want, back)
		}
		if scale != "log" || atNewest != (back == 0) {
			t.Errorf("phase %d: scale %q, last_start = as_of %v; want log and %v", phase, scale, atNewest, back == 0)
		}
		if back == 0 {
			// level + effect at N's phase is the fit at N, f(0)^T theta.
			logSpec.Regressors(0, f)
			var fit float64
			for i := range f {
				fit += f[i] * theta[i]
			}
			if !scalar.EqualWithinAbsOrRel(level+effect, fit, 0, tol) {
				t.Errorf("level + effect at the newest bucket's phase = %v, want the fit %v", level+effect, fit)
			}
		}
		n++
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if n != 12 {
		t.Fatalf("%d phases, want 12", n)
	}
	var plain int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.components WHERE tracker = 'plain' AND phase IS NULL AND effect IS NULL
		AND scale = 'none' AND level IS NOT NULL`).Scan(&plain); err != nil {
		t.Fatal(err)
	}
	if plain != 1 {
		t.Errorf("%d rows for the tracker without a season, want 1 with phase and effect NULL", plain)
	}
}
