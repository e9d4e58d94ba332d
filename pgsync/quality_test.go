package pgsync

import (
	"context"
	"testing"
)

// TestMeterTuningKeepsIntervals is the meter case: hourly readings
// of 21 meters in daily buckets (sum), the first day holding only 11 of 24
// hours, tuned per series and applied. The partial first day is left out
// of the choice (each series' result scores the same buckets as one
// without it), and after the replay no forecast interval, cumulative bound
// or slope t-value is NULL, whatever lambda the search chose.
func TestMeterTuningKeepsIntervals(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE readings (meter text, read_at timestamptz, kwh float8)`)
	// Invented: meter m's hourly use is a level that wanders from day to
	// day (a random walk of fixed hashed steps, so that short memories
	// win), a daily cycle, lower weekends and noise from a fixed hash of
	// the hour, from 2026-03-01 13:00 (11 hours on the first day) for 50
	// days.
	exec(t, pool, `INSERT INTO readings
		WITH walk AS (
			SELECT m, d, 2 + m / 10.0 + 0.4 * sum((hashint4(m * 1000 + d) % 1000) / 1000.0) OVER (PARTITION BY m ORDER BY d) AS level
			FROM generate_series(1, 21) AS m, generate_series(0, 50) AS d)
		SELECT 'm' || lpad(w.m::text, 2, '0'), ts,
		       w.level * (1 + 0.3 * sin(2 * pi() * extract(hour FROM ts) / 24))
		       * CASE WHEN extract(isodow FROM ts) >= 6 THEN 0.7 ELSE 1 END
		       + 0.2 * ((hashint4(w.m * 100000 + (extract(epoch FROM ts) / 3600)::int) % 1000) / 1000.0)
		FROM generate_series(timestamptz '2026-03-01 13:00+00', timestamptz '2026-04-19 23:00+00', interval '1 hour') AS ts
		JOIN walk w ON w.d = (ts::date - date '2026-03-01')`)
	exec(t, pool, `SELECT sidetrend.track('readings', 'read_at', 'kwh', '{meter}', bucket => '1 day', agg => 'sum',
		period => 7, harmonics => 2, horizon => 14, tz => 'UTC')`)
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	res, err := Tune(ctx, pool, TuneOptions{Tracker: "readings", PerSeries: true, Apply: true})
	if err != nil {
		t.Fatal(err)
	}
	if len(res) != 22 {
		t.Fatalf("%d results, want the tracker's and 21 series'", len(res))
	}
	d, err := LoadSeries(ctx, pool, "readings", "m01")
	if err != nil {
		t.Fatal(err)
	}
	if got := len(d.WithoutPartialStart()); got != len(d.Values)-1 || d.Counts[0] != 11 {
		t.Fatalf("first day: %d rows, %d of %d buckets kept; want 11 rows and the first day left out", d.Counts[0], got, len(d.Values))
	}
	for _, r := range res[1:] {
		if r.N == 0 || r.RMSEAfter > r.RMSEBefore*(1+1e-9) {
			t.Errorf("series %s: %d errors, rmse %v before %v", *r.SeriesKey, r.N, r.RMSEAfter, r.RMSEBefore)
		}
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var rows, nulls int
	if err := pool.QueryRow(ctx, `SELECT count(*), count(*) FILTER (WHERE lower95 IS NULL OR upper95 IS NULL OR lower80 IS NULL
		OR cum_lower95 IS NULL OR cum_upper95 IS NULL) FROM sidetrend.forecasts WHERE tracker = 'readings'`).Scan(&rows, &nulls); err != nil {
		t.Fatal(err)
	}
	if rows != 21*14 || nulls != 0 {
		t.Errorf("%d forecast rows (want %d), %d with a NULL bound", rows, 21*14, nulls)
	}
	if err := pool.QueryRow(ctx, `SELECT count(*), count(*) FILTER (WHERE slope_t IS NULL)
		FROM sidetrend.slopes WHERE tracker = 'readings'`).Scan(&rows, &nulls); err != nil {
		t.Fatal(err)
	}
	if rows != 21 || nulls != 0 {
		t.Errorf("%d slope rows, %d with a NULL t-value", rows, nulls)
	}
	var widest float64
	if err := pool.QueryRow(ctx, `SELECT max((f.upper95 - f.lower95) / 2 / a.rmse)
		FROM sidetrend.forecasts f JOIN sidetrend.accuracy a USING (tracker, series_key)
		WHERE f.tracker = 'readings' AND f.horizon = 1`).Scan(&widest); err != nil {
		t.Fatal(err)
	}
	if widest > 20 {
		t.Errorf("a one-step 95 %% half-width is %.1f times the series' one-step RMSE", widest)
	}
	t.Logf("lambdas chosen: tracker %v (seasonal %v), series e.g. %v; widest one-step half-width %.2f RMSE",
		res[0].Lambda, res[0].SeasonLambda, res[1].Lambda, widest)
}

// TestTuneSQLShowsModels: sidetrend.tune() shows, after its first five
// columns, the seasonal factor, both models as text, the errors scored and
// the bound notes, from the same stored result the CLI prints; a model's
// RMSE appears once.
func TestTuneSQLShowsModels(t *testing.T) {
	t.Parallel()
	pool := tunedSales(t, 16)
	ctx := context.Background()
	res, err := Tune(ctx, pool, TuneOptions{Tracker: "sales"})
	if err != nil {
		t.Fatal(err)
	}
	r := res[0]
	var before, after float64
	var n int64
	var modelBefore, model string
	if err := pool.QueryRow(ctx, `SELECT rmse_before, rmse_after, model_before, model, n_errors FROM sidetrend.tune('sales')`).
		Scan(&before, &after, &modelBefore, &model, &n); err != nil {
		t.Fatal(err)
	}
	if before != r.RMSEBefore || after != r.RMSEAfter || n != r.N || model != r.Model || modelBefore != r.ModelBefore ||
		modelBefore != "degree 1, 2 harmonics of 7, lambda 0.95" {
		t.Errorf("tune(): %v %v %q %q %d; Tune: %+v", before, after, modelBefore, model, n, r)
	}
	if model == modelBefore && before != after {
		t.Errorf("the same model %q with two RMSEs %v and %v", model, before, after)
	}
}
