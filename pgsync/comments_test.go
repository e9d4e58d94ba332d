package pgsync

import (
	"context"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
)

// TestEveryViewColumnHasComment: every column of every view of schema
// sidetrend has a COMMENT (psql's \d+ shows it).
func TestEveryViewColumnHasComment(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	rows, err := pool.Query(context.Background(), `
		SELECT c.relname || '.' || a.attname
		FROM pg_class c JOIN pg_attribute a ON a.attrelid = c.oid AND a.attnum > 0 AND NOT a.attisdropped
		WHERE c.relnamespace = 'sidetrend'::regnamespace AND c.relkind = 'v'
		  AND coalesce(col_description(c.oid, a.attnum), '') = ''
		ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	missing, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range missing {
		t.Errorf("view column sidetrend.%s has no comment", m)
	}
}

// TestForecastCaution: forecasts that reach beyond the series' history or
// beyond the fit's memory of 1/(1 - lambda) buckets say so.
func TestForecastCaution(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (at timestamptz, k text, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', degree => 0, lambda => 0.5, horizon => 6, name => 'obs')`)
	// long: 20 days; short: 4 days.
	exec(t, pool, `INSERT INTO obs SELECT '2026-02-01 12:00Z'::timestamptz + d * interval '1 day', 'long', 5 + d % 3 FROM generate_series(0, 19) d`)
	exec(t, pool, `INSERT INTO obs SELECT '2026-02-17 12:00Z'::timestamptz + d * interval '1 day', 'short', 7 + d % 2 FROM generate_series(0, 3) d`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	rows, err := pool.Query(ctx, `SELECT series_key, horizon, data_buckets, reach, coalesce(caution, '') FROM sidetrend.forecasts ORDER BY 1, 2`)
	if err != nil {
		t.Fatal(err)
	}
	defer rows.Close()
	n := 0
	for rows.Next() {
		var key, caution string
		var h int
		var data int64
		var reach float64
		if err := rows.Scan(&key, &h, &data, &reach, &caution); err != nil {
			t.Fatal(err)
		}
		n++
		wantData := map[string]int64{"long": 20, "short": 4}[key]
		// lambda 0.5 remembers mostly the last 1/(1 - 0.5) = 2 buckets.
		want := ""
		switch {
		case int64(h) > wantData:
			want = "extrapolation beyond the data"
		case h > 2:
			want = "beyond the fit's memory"
		}
		if data != wantData || reach != float64(h)/float64(wantData) || !strings.HasPrefix(caution, want) || (want == "") != (caution == "") {
			t.Errorf("%s horizon %d: data_buckets %d, reach %v, caution %q; want %d, %v, %q", key, h, data, reach, caution, wantData, float64(h)/float64(wantData), want)
		}
	}
	if n != 12 {
		t.Errorf("%d forecast rows, want 12", n)
	}
}
