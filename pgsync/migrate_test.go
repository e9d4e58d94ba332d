package pgsync

import (
	"context"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5/stdlib"
	"github.com/pressly/goose/v3"
)

// testMigrationProvider is the goose provider of the sidecar's migrations
// on the database at url, closed when t ends.
func testMigrationProvider(t *testing.T, url string) *goose.Provider {
	t.Helper()
	cfg, err := parseConfig(url)
	if err != nil {
		t.Fatal(err)
	}
	db := stdlib.OpenDB(*cfg.ConnConfig)
	t.Cleanup(func() { db.Close() })
	p, err := newMigrationProvider(db)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// TestThroughputMigrationDownUp steps migration 00005 down and up again on a
// database with a tracker and forecast history: Down puts the foreign key
// of forecast_issues back, Up removes it and installs the trigger that
// deletes an untracked tracker's history.
func TestThroughputMigrationDownUp(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE sales (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('sales', 'at', 'v', horizon => 3)`)
	exec(t, pool, `INSERT INTO sales SELECT '2026-01-01'::timestamptz + d * interval '1 day', d FROM generate_series(0, 9) d`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	p := testMigrationProvider(t, url)
	state := func() (fk, trigger bool, history int) {
		t.Helper()
		err := pool.QueryRow(ctx, `
			SELECT EXISTS (SELECT 1 FROM pg_constraint WHERE conrelid = 'sidetrend.forecast_issues'::regclass AND contype = 'f'),
			       EXISTS (SELECT 1 FROM pg_trigger WHERE tgrelid = 'sidetrend.trackers'::regclass AND tgname = '_forget_history'),
			       (SELECT count(*) FROM sidetrend.forecast_issues)`).Scan(&fk, &trigger, &history)
		if err != nil {
			t.Fatal(err)
		}
		return
	}
	bounds := func() string {
		t.Helper()
		var s string
		err := pool.QueryRow(ctx, `SELECT coalesce(string_agg(concat_ws(' ', horizon, forecast, lower80, upper80, lower95, upper95, cum_lower95, cum_upper95), '; ' ORDER BY horizon), '')
			FROM sidetrend.forecasts`).Scan(&s)
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	served := bounds()
	if served == "" {
		t.Fatal("no forecasts to compare")
	}
	fk, trig, before := state()
	if fk || !trig || before == 0 {
		t.Fatalf("after Up: foreign key %v, trigger %v, %d history rows; want no key, the trigger and some rows", fk, trig, before)
	}
	if _, err := p.DownTo(ctx, 4); err != nil {
		t.Fatalf("down to 4: %v", err)
	}
	if fk, trig, n := state(); !fk || trig || n != before {
		t.Fatalf("after Down: foreign key %v, trigger %v, %d history rows; want the key, no trigger, %d rows", fk, trig, n, before)
	}
	if _, err := p.Up(ctx); err != nil {
		t.Fatalf("up again: %v", err)
	}
	if fk, trig, n := state(); fk || !trig || n != before {
		t.Fatalf("after Up again: foreign key %v, trigger %v, %d history rows; want no key, the trigger, %d rows", fk, trig, n, before)
	}
	// Up marks ready series for a replay that fills the standard errors;
	// after it the view serves the very same forecasts and bounds.
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if got := bounds(); got != served {
		t.Errorf("forecasts after Down, Up and a replay:\n%s\nwant as served before:\n%s", got, served)
	}
}

// TestHistorySEMigrationDownUp steps migration 00006 down and up again on a
// database with forecast history written in both layouts: Down computes the
// bounds of rows that store standard errors, Up leaves every row as it is,
// and sidetrend.forecast_history reads the same, to the last digit, all
// along.
func TestHistorySEMigrationDownUp(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE sales (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('sales', 'at', 'v', horizon => 3)`)
	exec(t, pool, `INSERT INTO sales SELECT '2026-01-01'::timestamptz + d * interval '1 day', d + (d % 3) FROM generate_series(0, 9) d`)
	p := testMigrationProvider(t, url)
	// history reads the view at the newest version and, with old, as
	// migrations 00006 and 00007 leave it, whose columns had the names
	// that migration 00008 replaced: they are read by position there.
	history := func(old ...bool) string {
		t.Helper()
		from := `(SELECT period_start, horizon, forecast, lower95, upper95 FROM sidetrend.forecast_history) h`
		if len(old) > 0 && old[0] {
			from = `sidetrend.forecast_history AS h(tracker_id, series_key, issued_for, horizon, period_start, forecast, lower95, upper95)`
		}
		var s string
		err := pool.QueryRow(ctx, `SELECT coalesce(string_agg(concat_ws(' ', period_start, horizon, forecast, lower95, upper95), '; '
			ORDER BY period_start - horizon * interval '1 day', horizon), '') FROM `+from).Scan(&s)
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	// Down: history rows written so far get their bounds computed.
	written := history()
	if written == "" {
		t.Fatal("no forecast history to compare")
	}
	// downAndUp steps 00006 down, checks that the history still reads
	// want, and steps it up again.
	downAndUp := func(want, when string) {
		t.Helper()
		if _, err := p.DownTo(ctx, 5); err != nil {
			t.Fatalf("%s: down to 5: %v", when, err)
		}
		if got := history(true); got != want {
			t.Fatalf("history after Down (%s):\n%s\nwant:\n%s", when, got, want)
		}
		if _, err := p.Up(ctx); err != nil {
			t.Fatalf("%s: up again: %v", when, err)
		}
	}
	downAndUp(written, "standard errors only")
	// Rows with stored bounds (from Down) and with standard errors (new
	// issues) side by side.
	exec(t, pool, `INSERT INTO sales SELECT '2026-01-01'::timestamptz + d * interval '1 day', 2 * d FROM generate_series(10, 13) d`)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var stored, withSE int
	if err := pool.QueryRow(ctx, `SELECT count(*) FILTER (WHERE se IS NULL AND lower95 IS NOT NULL), count(*) FILTER (WHERE se IS NOT NULL AND lower95 IS NULL)
		FROM sidetrend.forecast_issues`).Scan(&stored, &withSE); err != nil {
		t.Fatal(err)
	}
	if stored == 0 || withSE == 0 {
		t.Fatalf("%d history rows with stored bounds and %d with standard errors; want some of each", stored, withSE)
	}
	mixed := history()
	if !strings.HasPrefix(mixed, written) || len(mixed) == len(written) {
		t.Fatalf("history after Up and more rows:\n%s\nwant it to start with:\n%s", mixed, written)
	}
	downAndUp(mixed, "both layouts")
}
