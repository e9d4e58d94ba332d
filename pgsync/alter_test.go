package pgsync

import (
	"context"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/sidetrend/sidetrend/estimator"
)

// TestAlterTracker changes a tracker's model, lambda, horizon and burn-in
// (a replay from the stored points), then its bucket width and zone (the
// source read again), and checks each time that the series equal a fit
// from scratch under the new settings, with the points kept. Bad settings
// are refused with what to use, and change nothing.
func TestAlterTracker(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs')`)
	s := NewSyncer(pool, nil)
	day := func(d int) time.Time { return time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC).AddDate(0, 0, d) }
	for d := 0; d < 70; d++ {
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, 'a', $2), ($1, 'b', $3)`, day(d),
			50+0.3*float64(d)+float64(d%7), 20-0.1*float64(d)+float64(d%3))
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	r := obsTracker("obs", "sum", "zero")
	compareAll(t, pool, r, referenceFit(t, pool, r), "before alter")
	count := func(sql string) int {
		t.Helper()
		var n int
		if err := pool.QueryRow(ctx, sql).Scan(&n); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
		return n
	}
	points, issues := count(`SELECT count(*) FROM sidetrend.points`), count(`SELECT count(*) FROM sidetrend.forecast_issues`)

	// Model, lambda, horizon, burn-in: a replay from the stored points.
	period, harmonics, horizon, lambda := 7.0, 2, 9, 0.8
	msg, err := AlterTracker(ctx, pool, "obs", AlterOptions{Period: &period, Harmonics: &harmonics, Horizon: &horizon, Lambda: &lambda})
	if err != nil {
		t.Fatal(err)
	}
	t.Log(msg)
	for _, w := range []string{"horizon 5 -> 9", "period none -> 7", "harmonics 0 -> 2", "lambda 0.9 -> 0.8", "replays its 2 series from their 140 stored points"} {
		if !strings.Contains(msg, w) {
			t.Errorf("alter says %q, want %q in it", msg, w)
		}
	}
	// The Syncer made before the change replays with the new settings.
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	r.spec = estimator.Spec{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.8}
	r.horizon = 9
	compareAll(t, pool, r, referenceFit(t, pool, r), "after a model change")
	if n := count(`SELECT count(*) FROM sidetrend.points`); n != points {
		t.Errorf("%d points after a model change, want the %d kept", n, points)
	}
	if n := count(`SELECT count(*) FROM sidetrend.forecast_issues`); n < issues {
		t.Errorf("%d served forecasts after a model change, want the %d kept and more", n, issues)
	}

	// Bad settings: an error saying what to use, nothing changed.
	before := seriesSnapshot(t, ctx, pool)
	var settings string
	if err := pool.QueryRow(ctx, `SELECT t::text FROM sidetrend.trackers t`).Scan(&settings); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ sql, want, hint string }{
		{`SELECT sidetrend.alter_tracker('obs', degree => 5)`, "degree 5 is not supported", "from 0 to 3"},
		{`SELECT sidetrend.alter_tracker('obs', period => 'NaN')`, "period NaN is not a number of buckets", "period => 0"},
		{`SELECT sidetrend.alter_tracker('obs', harmonics => 4)`, "4 harmonics are too many for period 7", "at most 3"},
		{`SELECT sidetrend.alter_tracker('obs', lambda => 1.2)`, "lambda 1.2 is outside (0, 1]", "lambda_auto"},
		{`SELECT sidetrend.alter_tracker('obs', lambda => 0.9, lambda_auto => true)`, "contradict", "Pass one of them"},
		{`SELECT sidetrend.alter_tracker('obs', horizon => 0)`, "horizon 0 is out of range", "1 to 1000"},
		{`SELECT sidetrend.alter_tracker('obs', burn_in => -2)`, "burn_in -2 is out of range", "0 to 100000"},
		{`SELECT sidetrend.alter_tracker('obs', history_buckets => -1)`, "history_buckets -1 is out of range", "0 (keep no served forecasts)"},
		{`SELECT sidetrend.alter_tracker('obs', bucket => '0 days')`, "is zero", ""},
		{`SELECT sidetrend.alter_tracker('obs', tz => 'Atlantis/Capital')`, "Atlantis/Capital", ""},
		{`SELECT sidetrend.alter_tracker('obs', span => '1 hour')`, "span '01:00:00' is out of range", "at least one bucket"},
		{`SELECT sidetrend.alter_tracker('nope', horizon => 3)`, `no tracker named "nope"`, "tracker_settings"},
	} {
		_, err := pool.Exec(ctx, c.sql)
		var pg *pgconn.PgError
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: %v, want an error saying %q", c.sql, err, c.want)
		} else if c.hint != "" && (!errors.As(err, &pg) || !strings.Contains(pg.Hint, c.hint)) {
			t.Errorf("%s: hint %q, want %q in it", c.sql, pg.Hint, c.hint)
		}
	}
	var after string
	if err := pool.QueryRow(ctx, `SELECT t::text FROM sidetrend.trackers t`).Scan(&after); err != nil || after != settings {
		t.Errorf("refused changes changed the tracker:\n%s\n%s", settings, after)
	}
	if got := seriesSnapshot(t, ctx, pool); got != before {
		t.Errorf("refused changes changed the series")
	}
	if msg, err := AlterTracker(ctx, pool, "obs", AlterOptions{Horizon: &horizon}); err != nil || !strings.Contains(msg, "unchanged") {
		t.Errorf("alter to the same horizon: %q, %v; want unchanged", msg, err)
	}

	// Bucket width and zone: the source is read again into weekly buckets
	// (70 days make 10 weekly buckets for each of the two series: 20 points).
	// in another zone, in the same transaction; the sidecar replays.
	week, zone, noSeason := "7 days", "America/Sao_Paulo", 0.0
	msg, err = AlterTracker(ctx, pool, "obs", AlterOptions{Bucket: &week, TZ: &zone, Period: &noSeason})
	if err != nil {
		t.Fatal(err)
	}
	t.Log(msg)
	if !strings.Contains(msg, "bucket 1 day -> 7 days") || !strings.Contains(msg, "read again into 20 points of 2 series") {
		t.Errorf("alter says %q", msg)
	}
	if n := count(`SELECT count(*) FROM sidetrend.forecast_issues`); n != 0 {
		t.Errorf("%d served forecasts of the old buckets left", n)
	}
	// New rows land in the new buckets (the capture code was installed again).
	exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, 'a', 70)`, day(70))
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	r.bucket, r.tz, r.spec = "7 days", zone, estimator.Spec{Degree: 1, Lambda: 0.8}
	compareAll(t, pool, r, referenceFit(t, pool, r), "after a bucket and zone change")
	if n := count(`SELECT count(*) FROM sidetrend.series WHERE rebuild OR failed`); n != 0 {
		t.Errorf("%d series still waiting for a replay", n)
	}
}
