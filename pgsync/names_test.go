package pgsync

import (
	"bufio"
	"bytes"
	"context"
	"os"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
)

// oldColumnNames reads testdata/old_names.txt: the column names migration
// 00008 replaced.
func oldColumnNames(t *testing.T) []string {
	t.Helper()
	b, err := os.ReadFile("../testdata/old_names.txt")
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	sc := bufio.NewScanner(bytes.NewReader(b))
	for sc.Scan() {
		if line := strings.TrimSpace(sc.Text()); line != "" && !strings.HasPrefix(line, "#") {
			names = append(names, strings.ToLower(line))
		}
	}
	if len(names) == 0 {
		t.Fatal("testdata/old_names.txt lists no names")
	}
	return names
}

// TestNamesMigration checks migration 00008 on a database with a tracker,
// forecasts, history and a rejected row: after it no column of schema
// sidetrend (and no comment on one) spells a replaced name; stepped down
// every replaced name is back; up again the forecasts read the same,
// grants on the recreated views survive, and forecast_history,
// accuracy_by_horizon and rejected_rows show a reader only the trackers
// whose source table it may read.
func TestNamesMigration(t *testing.T) {
	t.Parallel()
	roles := testRoles(t, map[string]string{"reader": ""})
	pool, url := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE sales (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('sales', 'at', 'v', horizon => 3)`)
	exec(t, pool, `INSERT INTO sales SELECT '2026-01-01'::timestamptz + d * interval '1 day', d + (d % 3) FROM generate_series(0, 11) d`)
	// Days added one by one after the backfill issue forecasts that later
	// days score (accuracy_by_horizon).
	sync := NewSyncer(pool, nil)
	for d := 12; d < 16; d++ {
		if err := sync.CatchUp(ctx); err != nil {
			t.Fatal(err)
		}
		exec(t, pool, `INSERT INTO sales VALUES ('2026-01-01'::timestamptz + $1 * interval '1 day', $1)`, d)
	}
	exec(t, pool, `INSERT INTO sales VALUES ('2026-01-20', NULL)`)
	if err := sync.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	reader := pgx.Identifier{roles["reader"]}.Sanitize()
	exec(t, pool, `GRANT USAGE ON SCHEMA sidetrend TO `+reader)
	exec(t, pool, `GRANT SELECT ON sidetrend.forecasts, sidetrend.forecast_history, sidetrend.accuracy_by_horizon TO `+reader)

	names := oldColumnNames(t)
	var patterns []string
	for _, n := range names {
		patterns = append(patterns, "%"+n+"%")
	}
	// spelled lists the columns of schema sidetrend, and the comments on
	// its tables, views and their columns, that contain a replaced name.
	spelled := func() []string {
		t.Helper()
		rows, err := pool.Query(ctx, `
			SELECT table_name || '.' || column_name FROM information_schema.columns
			WHERE table_schema = 'sidetrend' AND lower(column_name) LIKE ANY ($1)
			UNION ALL
			SELECT 'comment on ' || c.relname || coalesce('.' || a.attname, '') FROM pg_description d
			JOIN pg_class c ON c.oid = d.objoid AND d.classoid = 'pg_class'::regclass
			LEFT JOIN pg_attribute a ON a.attrelid = c.oid AND a.attnum = d.objsubid AND d.objsubid > 0
			WHERE c.relnamespace = 'sidetrend'::regnamespace AND lower(d.description) LIKE ANY ($1)
			ORDER BY 1`, patterns)
		if err != nil {
			t.Fatal(err)
		}
		got, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			t.Fatal(err)
		}
		return got
	}
	// forecasts renders sidetrend.forecasts by position, whatever its
	// columns are called.
	forecasts := func() string {
		t.Helper()
		var s string
		if err := pool.QueryRow(ctx, `SELECT coalesce(string_agg(f::text, '; ' ORDER BY f.horizon), '') FROM sidetrend.forecasts f`).Scan(&s); err != nil {
			t.Fatal(err)
		}
		return s
	}
	if got := spelled(); len(got) > 0 {
		t.Errorf("after migrating, replaced names in %v", got)
	}
	served := forecasts()
	if served == "" {
		t.Fatal("no forecasts to compare")
	}

	p := testMigrationProvider(t, url)
	// Down to just before 00008 (later migrations go down with it).
	if _, err := p.DownTo(ctx, 7); err != nil {
		t.Fatalf("down to version 7: %v", err)
	}
	back := strings.Join(spelled(), " ")
	for _, n := range names {
		if !strings.Contains(back, n) {
			t.Errorf("after Down no column or comment spells %q; have %s", n, back)
		}
	}
	if got := forecasts(); got != served {
		t.Errorf("forecasts after Down:\n%s\nwant:\n%s", got, served)
	}
	if _, err := p.Up(ctx); err != nil {
		t.Fatalf("up again: %v", err)
	}
	if got := spelled(); len(got) > 0 {
		t.Errorf("after Down and Up, replaced names in %v", got)
	}
	if got := forecasts(); got != served {
		t.Errorf("forecasts after Down and Up:\n%s\nwant:\n%s", got, served)
	}

	// The reader kept its grants on the recreated views and got the ones
	// of sidetrend.forecasts on rejected_rows, but sees no rows of a table
	// it may not read until it may.
	as := connectURL(t, asRole(t, url, roles["reader"]))
	count := func(view string) int {
		t.Helper()
		var n int
		if err := as.QueryRow(ctx, `SELECT count(*) FROM sidetrend.`+view).Scan(&n); err != nil {
			t.Fatalf("the reader counts sidetrend.%s: %v", view, err)
		}
		return n
	}
	views := []string{"forecast_history", "accuracy_by_horizon", "rejected_rows"}
	for _, v := range views {
		if n := count(v); n != 0 {
			t.Errorf("a reader without SELECT on sales sees %d rows of sidetrend.%s, want 0", n, v)
		}
	}
	exec(t, pool, `GRANT SELECT ON sales TO `+reader)
	for _, v := range views {
		if n := count(v); n == 0 {
			t.Errorf("a reader with SELECT on sales sees no rows of sidetrend.%s", v)
		}
	}
	var tracker, reason string
	if err := as.QueryRow(ctx, `SELECT tracker, reason FROM sidetrend.rejected_rows`).Scan(&tracker, &reason); err != nil || tracker != "sales" {
		t.Errorf("rejected row of tracker %q (%q, err %v), want tracker sales", tracker, reason, err)
	}
}
