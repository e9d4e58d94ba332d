package pgsync

import (
	"context"
	"strings"
	"testing"
	"time"
)

// TestSeriesIsolation: an error that belongs to one series (its own tuned
// lambda is unusable, its stored state does not decode) marks that series
// with the error and the time, and the same batch folds every other series
// of the tracker and of another tracker. The failed series keeps its last
// good forecasts, and the next change after the cause is fixed replays it.
func TestSeriesIsolation(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs')`)
	exec(t, pool, `CREATE TABLE other (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('other', 'at', 'v', lambda => 0.9, horizon => 5)`)
	s := NewSyncer(pool, nil)
	day := func(d int) time.Time { return time.Date(2026, 5, 1+d, 9, 0, 0, 0, time.UTC) }
	for d := 0; d < 20; d++ {
		for _, k := range []string{"a", "b", "c"} {
			exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, $3)`, day(d), k, 10+0.5*float64(d))
		}
		exec(t, pool, `INSERT INTO other (at, v) VALUES ($1, $2)`, day(d), float64(d))
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var forecastA string
	if err := pool.QueryRow(ctx, `SELECT forecast::text FROM sidetrend.series WHERE series_key = 'a'`).Scan(&forecastA); err != nil {
		t.Fatal(err)
	}

	// Series a gets a lambda of its own that no state can use (as a bad
	// manual UPDATE would leave it); series b's stored state is garbage.
	exec(t, pool, `UPDATE sidetrend.series SET lambda = 'NaN' WHERE series_key = 'a'`)
	exec(t, pool, `UPDATE sidetrend.series SET state = '\x00ff'::bytea WHERE series_key = 'b'`)
	// a and c get a late row (a replay) and a new day; b only the new day,
	// so that its state is decoded.
	for _, k := range []string{"a", "c"} {
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, 99)`, day(3), k)
	}
	for _, k := range []string{"a", "b", "c"} {
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, 100)`, day(20), k)
	}
	exec(t, pool, `INSERT INTO other (at, v) VALUES ($1, 20)`, day(20))
	if err := s.CatchUp(ctx); err != nil {
		t.Fatalf("catch-up with one failing series: %v", err)
	}
	if got := s.Stats().Failed; got != 1 {
		t.Errorf("Stats.Failed = %d, want 1", got)
	}
	type row struct {
		folded       int64
		failed       bool
		lastErr      string
		errAt        *time.Time
		forecast     string
		trackerState string
	}
	read := func(tracker, key string) row {
		t.Helper()
		var r row
		var folded *int64
		var lastErr *string
		if err := pool.QueryRow(ctx, `SELECT s.folded_through, s.failed, s.last_error, s.error_at, coalesce(s.forecast::text, ''), t.status
			FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id WHERE t.name = $1 AND s.series_key = $2`, tracker, key).
			Scan(&folded, &r.failed, &lastErr, &r.errAt, &r.forecast, &r.trackerState); err != nil {
			t.Fatalf("%s/%s: %v", tracker, key, err)
		}
		if folded != nil {
			r.folded = *folded
		}
		if lastErr != nil {
			r.lastErr = *lastErr
		}
		return r
	}
	a, b, c, o := read("obs", "a"), read("obs", "b"), read("obs", "c"), read("other", "")
	if !a.failed || !strings.Contains(a.lastErr, "lambda") || a.errAt == nil || a.forecast != forecastA || a.trackerState != "active" {
		t.Errorf("series a: failed %v, error %q at %v, forecast %s (was %s), tracker %s; want failed with its error and time, its last forecasts, the tracker active",
			a.failed, a.lastErr, a.errAt, a.forecast, forecastA, a.trackerState)
	}
	bucket20 := c.folded
	if b.failed || !strings.Contains(b.lastErr, "did not decode") || b.errAt == nil || b.folded != bucket20 {
		t.Errorf("series b: failed %v, error %q at %v, folded %d; want replayed through %d with a note", b.failed, b.lastErr, b.errAt, b.folded, bucket20)
	}
	if c.failed || c.lastErr != "" || c.errAt != nil || o.folded != bucket20 || o.failed {
		t.Errorf("series c (error %q) and the other tracker (folded %d) should have folded the new day %d", c.lastErr, o.folded, bucket20)
	}
	var left int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&left); err != nil || left != 0 {
		t.Errorf("%d changes left in the log (err %v), want 0", left, err)
	}
	// A failed series is not retried by every due batch.
	before := s.Stats().Failed
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if s.Stats().Failed != before {
		t.Errorf("a catch-up with no change retried the failed series")
	}

	// The cause fixed, the next change replays series a from all its
	// points: it then equals a series that never failed.
	exec(t, pool, `UPDATE sidetrend.series SET lambda = NULL WHERE series_key = 'a'`)
	for _, k := range []string{"a", "c"} {
		exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, 50)`, day(21), k)
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	a, c = read("obs", "a"), read("obs", "c")
	if a.failed || a.lastErr != "" || a.errAt != nil || a.forecast != c.forecast {
		t.Errorf("series a after the fix: failed %v, error %q, forecast %s; want the same as series c %s", a.failed, a.lastErr, a.forecast, c.forecast)
	}
}
