package pgsync

import (
	"context"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/estimator"
)

var obsSpec = estimator.Spec{Degree: 1, Lambda: 0.9}

func obsTracker(name, agg, empty string) refTracker {
	return refTracker{name: name, table: "obs", agg: agg, empty: empty, bucket: "1 day", tz: "UTC", spec: obsSpec, horizon: 5}
}

// TestBadInput feeds each kind of bad or extreme input and checks that it
// gets a reject row or a clear error and that nothing else changes.
func TestBadInput(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	// The span covers the whole calendar: the years 1 and 9999 below are
	// folded in (TestWriterCannotStopTheLog checks the default span).
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs', span => '10000 years')`)
	r := obsTracker("obs", "sum", "zero")
	s := NewSyncer(pool, nil)
	day := func(d int) time.Time { return time.Date(2026, 5, 1+d, 9, 0, 0, 0, time.UTC) }
	for d := 0; d < 20; d++ {
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, 'good', $2)`, day(d), 10+0.5*float64(d))
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, 'flat', 7)`, day(d))
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	compareAll(t, pool, r, referenceFit(t, pool, r), "before bad input")

	// Each statement mixes bad rows with nothing else; none may change a state.
	before := seriesSnapshot(t, ctx, pool)
	bad := []struct{ sql, reason string }{
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', 'good', NULL)`, "value is NULL"},
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', 'good', 'NaN')`, "value is NaN"},
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', 'good', 'Infinity')`, "value is infinite"},
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', 'good', '-Infinity')`, "value is infinite"},
		{`INSERT INTO obs (at, k, v) VALUES (NULL, 'good', 1)`, "time is NULL"},
		{`INSERT INTO obs (at, k, v) VALUES ('infinity', 'good', 1)`, "time is infinite"},
		{`INSERT INTO obs (at, k, v) VALUES ('20000-01-01 00:00Z', 'good', 1)`, "time is outside the years 1 to 9999"},
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', repeat('k', 1001), 1)`, "series key is longer than 1000 bytes"},
		{`INSERT INTO obs (at, k, v) VALUES ('2026-05-25 10:00Z', 'good', 1e300)`, "value is beyond +-1e150"},
	}
	for _, b := range bad {
		exec(t, pool, b.sql)
		var reason string
		if err := pool.QueryRow(ctx, `SELECT reason FROM sidetrend.rejects ORDER BY id DESC LIMIT 1`).Scan(&reason); err != nil {
			t.Fatal(err)
		}
		if !strings.HasPrefix(reason, b.reason) {
			t.Errorf("%s: reject reason %q, want %q", b.sql, reason, b.reason)
		}
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if after := seriesSnapshot(t, ctx, pool); after != before {
		t.Errorf("bad rows changed a series state:\nbefore %s\nafter  %s", before, after)
	}

	// Year 1 and year 9999 are inside the calendar: folded in, no error.
	exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ('0001-01-01 00:00Z', 'ancient', 1), ('0001-01-02 00:00Z', 'ancient', 2),
		('0001-01-03 00:00Z', 'ancient', 3), ('9999-12-29 00:00Z', 'future', 4), ('9999-12-30 00:00Z', 'future', 5),
		('9999-12-31 00:00Z', 'future', 6), ('9999-12-31 12:00Z', 'future', 1)`)
	// Values near the float64 limit that pass the capture bound: 1e150 per
	// bucket squares to 1e300, still finite.
	exec(t, pool, `INSERT INTO obs (at, k, v) SELECT '2026-05-01 09:00Z'::timestamptz + d * interval '1 day', 'huge', 1e150 * (1 + d / 100.0) FROM generate_series(0, 9) d`)
	// A key with quotes, spaces, emoji, and one of 1,000 characters.
	long := strings.Repeat("ключ🚲", 167)[:1000]
	for _, k := range []string{`it's "quoted"`, "  spaced  out ", "🚲🥐", long} {
		for d := 0; d < 5; d++ {
			exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, $3)`, day(d), k, float64(d))
		}
	}
	began := time.Now()
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	t.Logf("catch-up after extreme input took %v", time.Since(began))
	began = time.Now()
	compareAll(t, pool, r, referenceFit(t, pool, r), "after extreme input")
	t.Logf("compare took %v", time.Since(began))

	// No state holds an Inf or a NaN.
	rows, err := pool.Query(ctx, `SELECT series_key, state FROM sidetrend.series WHERE state IS NOT NULL`)
	if err != nil {
		t.Fatal(err)
	}
	for rows.Next() {
		var key string
		var blob []byte
		if err := rows.Scan(&key, &blob); err != nil {
			t.Fatal(err)
		}
		st, err := estimator.UnmarshalState(blob)
		if err != nil {
			t.Errorf("series %q: stored state does not decode: %v", key, err)
			continue
		}
		if math.IsInf(st.RSS(), 0) || math.IsNaN(st.RSS()) || math.IsInf(st.Weight(), 0) {
			t.Errorf("series %q: state has S=%v T=%v", key, st.RSS(), st.Weight())
		}
	}
	// The constant series: slope 0, flat, intervals of zero width, no error.
	var slope, se float64
	var dir string
	if err := pool.QueryRow(ctx, `SELECT slope, slope_se, direction FROM sidetrend.slopes WHERE series_key = 'flat'`).Scan(&slope, &se, &dir); err != nil {
		t.Fatal(err)
	}
	if math.Abs(slope) > 1e-12 || dir != "flat" {
		t.Errorf("constant series: slope %v (se %v) %s, want 0 and flat", slope, se, dir)
	}
	var forecast float64
	if err := pool.QueryRow(ctx, `SELECT forecast FROM sidetrend.forecasts WHERE series_key = 'flat' AND horizon = 3`).Scan(&forecast); err != nil {
		t.Fatal(err)
	}
	if math.Abs(forecast-7) > 1e-9 {
		t.Errorf("constant series forecasts %v, want 7", forecast)
	}
	// Fewer points than parameters: warming, no forecast rows.
	exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ('2026-05-03 09:00Z', 'lonely', 3)`)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var state string
	if err := pool.QueryRow(ctx, `SELECT state FROM sidetrend.series_status WHERE series_key = 'lonely'`).Scan(&state); err != nil {
		t.Fatal(err)
	}
	if state != "warming" {
		t.Errorf("one point: state %q, want warming", state)
	}
}

// seriesSnapshot renders every series row's state and forecast as a digest,
// for before/after checks.
func seriesSnapshot(t *testing.T, ctx context.Context, pool *pgxpool.Pool) string {
	t.Helper()
	var out string
	err := pool.QueryRow(ctx, `SELECT coalesce(string_agg(series_key || '=' ||
		encode(sha256(coalesce(state, ''::bytea) || convert_to(coalesce(forecast::text, ''), 'UTF8')), 'hex'), ',' ORDER BY series_key), '')
		FROM sidetrend.series`).Scan(&out)
	if err != nil {
		t.Fatal(err)
	}
	if out == "" {
		t.Fatal("no series to compare")
	}
	return out
}
