package pgsync

import (
	"context"
	"testing"
)

// TestTruncateRebuildDrop covers the life of a tracker around its table:
// TRUNCATE resets its series, sidetrend.rebuild() rereads rows written with
// triggers disabled, a partitioned table is tracked, a dropped table marks
// its tracker broken while the others go on.
func TestTruncateRebuildDrop(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	s := NewSyncer(pool, nil)
	count := func(sql string, args ...any) int {
		t.Helper()
		var n int
		if err := pool.QueryRow(ctx, sql, args...).Scan(&n); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
		return n
	}
	catchUp := func() {
		t.Helper()
		if err := s.CatchUp(ctx); err != nil {
			t.Fatal(err)
		}
	}
	// A partitioned table, by month.
	exec(t, pool, `CREATE TABLE obs (id bigserial, at timestamptz NOT NULL, k text, v float8) PARTITION BY RANGE (at)`)
	exec(t, pool, `CREATE TABLE obs_2026_05 PARTITION OF obs FOR VALUES FROM ('2026-05-01') TO ('2026-06-01')`)
	exec(t, pool, `CREATE TABLE obs_2026_06 PARTITION OF obs FOR VALUES FROM ('2026-06-01') TO ('2026-07-01')`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs')`)
	exec(t, pool, `CREATE TABLE other (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('other', 'at', 'v', lambda => 0.9, horizon => 5)`)
	exec(t, pool, `INSERT INTO obs (at, k, v) SELECT '2026-05-20 08:00Z'::timestamptz + d * interval '1 day', 'a', 10 + d FROM generate_series(0, 19) d`)
	exec(t, pool, `INSERT INTO other (at, v) SELECT '2026-05-20 08:00Z'::timestamptz + d * interval '1 day', 3 * d FROM generate_series(0, 19) d`)
	catchUp()
	r := obsTracker("obs", "sum", "zero")
	compareAll(t, pool, r, referenceFit(t, pool, r), "partitioned table")
	if n := count(`SELECT count(*) FROM sidetrend.forecasts WHERE tracker = 'obs'`); n != 5 {
		t.Fatalf("partitioned table: %d forecast rows, want 5", n)
	}

	// Rows written with the triggers disabled are invisible until a rebuild
	// rereads the table.
	exec(t, pool, `ALTER TABLE obs_2026_06 DISABLE TRIGGER USER`)
	exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ('2026-06-09 08:00Z', 'a', 100)`)
	exec(t, pool, `ALTER TABLE obs_2026_06 ENABLE TRIGGER USER`)
	catchUp()
	var w2 = referenceFit(t, pool, r) // includes the silent row
	if n := count(`SELECT count(*) FROM sidetrend.changes`); n != 0 {
		t.Fatalf("change log has %d rows", n)
	}
	exec(t, pool, `SELECT sidetrend.rebuild('obs', 'a')`)
	catchUp()
	compareAll(t, pool, r, w2, "after rebuild of one series")
	exec(t, pool, `SELECT sidetrend.rebuild('obs')`)
	catchUp()
	compareAll(t, pool, r, w2, "after rebuild of the tracker")

	// TRUNCATE resets the tracker's series; new rows start them afresh.
	exec(t, pool, `TRUNCATE obs`)
	catchUp()
	if n := count(`SELECT count(*) FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id WHERE t.name = 'obs'`); n != 0 {
		t.Errorf("after TRUNCATE: %d series left, want 0", n)
	}
	exec(t, pool, `INSERT INTO obs (at, k, v) SELECT '2026-06-01 08:00Z'::timestamptz + d * interval '1 day', 'b', 5 + d FROM generate_series(0, 9) d`)
	catchUp()
	compareAll(t, pool, r, referenceFit(t, pool, r), "after TRUNCATE and new rows")

	// Dropping the source table: the tracker is marked broken, the other
	// tracker keeps being served and updated.
	exec(t, pool, `DROP TABLE obs`)
	exec(t, pool, `INSERT INTO other (at, v) VALUES ('2026-06-15 08:00Z', 99)`)
	catchUp()
	var status, lastErr string
	if err := pool.QueryRow(ctx, `SELECT status, last_error FROM sidetrend.trackers WHERE name = 'obs'`).Scan(&status, &lastErr); err != nil {
		t.Fatal(err)
	}
	if status != "broken" || lastErr == "" {
		t.Errorf("after DROP TABLE: status %q error %q, want broken with a reason", status, lastErr)
	}
	ro := refTracker{name: "other", table: "other", agg: "sum", empty: "zero", bucket: "1 day", tz: "UTC", spec: obsSpec, horizon: 5}
	exec(t, pool, `ALTER TABLE other ADD COLUMN k text`)
	compareAll(t, pool, ro, referenceFit(t, pool, ro), "other tracker after the drop")
	obsHistory := count(`SELECT count(*) FROM sidetrend.forecast_issues h JOIN sidetrend.trackers t ON t.id = h.tracker_id WHERE t.name = 'obs'`)
	otherHistory := count(`SELECT count(*) FROM sidetrend.forecast_issues h JOIN sidetrend.trackers t ON t.id = h.tracker_id WHERE t.name = 'other'`)
	if obsHistory == 0 || otherHistory == 0 {
		t.Fatalf("forecast history before untrack: %d rows of obs, %d of other; want some of each", obsHistory, otherHistory)
	}
	exec(t, pool, `SELECT sidetrend.untrack('obs')`)
	if n := count(`SELECT count(*) FROM sidetrend.trackers`); n != 1 {
		t.Errorf("%d trackers after untrack, want 1", n)
	}
	// Untracking deletes the tracker's forecast history (migration 00005's
	// trigger, which replaced a cascading foreign key) and no other's.
	if n := count(`SELECT count(*) FROM sidetrend.forecast_issues h WHERE NOT EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.id = h.tracker_id)`); n != 0 {
		t.Errorf("after untrack: %d forecast history rows of no tracker, want 0", n)
	}
	if n := count(`SELECT count(*) FROM sidetrend.forecast_issues`); n != otherHistory {
		t.Errorf("after untrack: %d forecast history rows, want the other tracker's %d", n, otherHistory)
	}
}
