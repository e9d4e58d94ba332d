package pgsync

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/sidetrend/sidetrend/internal/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// newDB returns a pool on a fresh, migrated database.
func newDB(t *testing.T) (*pgxpool.Pool, string) {
	t.Helper()
	url := pgtest.NewDatabase(t)
	return migratedPool(t, context.Background(), url), url
}

// migratedPool migrates the database at url and returns a pool on it,
// closed when tb ends.
func migratedPool(tb testing.TB, ctx context.Context, url string) *pgxpool.Pool {
	tb.Helper()
	if _, err := Migrate(ctx, url, nil); err != nil {
		tb.Fatal(err)
	}
	pool, err := Connect(ctx, url)
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(pool.Close)
	return pool
}

func exec(t *testing.T, pool *pgxpool.Pool, sql string, args ...any) {
	t.Helper()
	if _, err := pool.Exec(context.Background(), sql, args...); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
}

// dayIndex is the bucket index of a UTC daily bucket: days since
// 2001-01-01, the calendar's origin.
func dayIndex(ts time.Time) int64 {
	origin := time.Date(2001, 1, 1, 0, 0, 0, 0, time.UTC)
	return int64(math.Floor(ts.Sub(origin).Hours() / 24))
}

// offlineFit is the reference: SELECT the source table, bucket it in Go
// (daily, UTC, sum), fill empty buckets between observed ones with zeros,
// and fit the estimator from scratch. It knows nothing of the change log.
func offlineFit(t *testing.T, pool *pgxpool.Pool, table string, spec estimator.Spec) map[string]*estimator.State {
	t.Helper()
	out := map[string]*estimator.State{}
	for key, d := range dailySums(t, pool, table) { // a missing day is a zero sum
		st, err := estimator.Fit(spec, d.ys)
		if err != nil {
			t.Fatal(err)
		}
		out[key] = st
	}
	return out
}

type viewRow struct {
	key                                          string
	horizon                                      int
	forecast, lower80, upper80, lower95, upper95 *float64
	cumForecast, cumLower95, cumUpper95          *float64
}

// compareForecasts checks the forecasts view against the offline fits,
// relative 1e-9: the sidecar's sums are folded in another order than the
// offline sums, so the last few digits may differ (float addition is not
// associative); 1e-9 leaves room for that and nothing else.
func compareForecasts(t *testing.T, pool *pgxpool.Pool, tracker string, want map[string]*estimator.State, horizon int) {
	t.Helper()
	rows, err := pool.Query(context.Background(), `
		SELECT series_key, horizon, forecast, lower80, upper80, lower95, upper95, cum_forecast, cum_lower95, cum_upper95
		FROM sidetrend.forecasts WHERE tracker = $1 ORDER BY series_key, horizon`, tracker)
	if err != nil {
		t.Fatal(err)
	}
	got := map[string][]viewRow{}
	for rows.Next() {
		var r viewRow
		if err := rows.Scan(&r.key, &r.horizon, &r.forecast, &r.lower80, &r.upper80, &r.lower95, &r.upper95, &r.cumForecast, &r.cumLower95, &r.cumUpper95); err != nil {
			t.Fatal(err)
		}
		got[r.key] = append(got[r.key], r)
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	const tol = 1e-9
	for key, st := range want {
		if !st.Ready() {
			if len(got[key]) != 0 {
				t.Errorf("series %q: offline fit is not ready but the view has %d rows", key, len(got[key]))
			}
			continue
		}
		fc, err := st.Forecast(horizon)
		if err != nil {
			t.Fatal(err)
		}
		rs := got[key]
		if len(rs) != horizon {
			t.Fatalf("series %q: %d forecast rows, want %d", key, len(rs), horizon)
		}
		for i, r := range rs {
			check := func(name string, g *float64, w float64) {
				if math.IsNaN(w) {
					if g != nil {
						t.Errorf("series %q h=%d %s = %v, want NULL", key, i+1, name, *g)
					}
					return
				}
				if g == nil || !scalar.EqualWithinAbsOrRel(*g, w, 1e-9*math.Max(1, math.Abs(w)), tol) {
					t.Errorf("series %q h=%d %s = %v, want %v", key, i+1, name, deref2(g), w)
				}
			}
			check("forecast", r.forecast, fc.Forecast[i])
			check("lower80", r.lower80, fc.Lower80[i])
			check("upper80", r.upper80, fc.Upper80[i])
			check("lower95", r.lower95, fc.Lower95[i])
			check("upper95", r.upper95, fc.Upper95[i])
			check("cum_forecast", r.cumForecast, fc.CumForecast[i])
			check("cum_lower95", r.cumLower95, fc.CumLower95[i])
			check("cum_upper95", r.cumUpper95, fc.CumUpper95[i])
		}
	}
	for key := range got {
		if _, ok := want[key]; !ok {
			t.Errorf("view has series %q that the table does not", key)
		}
	}
}

func deref2(x *float64) any {
	if x == nil {
		return "NULL"
	}
	return *x
}

// salesRows makes a deterministic stream of rows: several shops, daily
// takings with a trend, a weekly cycle and noise, several rows per day.
func salesRows(rng *rand.Rand, shops, days, perDay int) [][]any {
	start := time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
	var out [][]any
	for d := 0; d < days; d++ {
		for s := 0; s < shops; s++ {
			if rng.IntN(20) == 0 {
				continue // a day without any sale: an empty bucket, zero by the sum policy
			}
			for k := 0; k < perDay; k++ {
				ts := start.Add(time.Duration(d)*24*time.Hour + time.Duration(rng.IntN(86400))*time.Second)
				v := 50 + 0.3*float64(d) + 8*math.Sin(2*math.Pi*float64(d)/7) + 3*rng.NormFloat64() + float64(s)
				out = append(out, []any{ts, fmt.Sprintf("shop %d", s), math.Round(v*100) / 100})
			}
		}
	}
	return out
}

func insertRows(t *testing.T, pool *pgxpool.Pool, table string, rows [][]any) {
	t.Helper()
	if len(rows) == 0 {
		return
	}
	var sb strings.Builder
	args := make([]any, 0, 3*len(rows))
	fmt.Fprintf(&sb, "INSERT INTO %s (sold_at, shop, amount) VALUES ", table)
	for i, r := range rows {
		if i > 0 {
			sb.WriteString(", ")
		}
		fmt.Fprintf(&sb, "($%d, $%d, $%d)", 3*i+1, 3*i+2, 3*i+3)
		args = append(args, r...)
	}
	exec(t, pool, sb.String(), args...)
}

var salesSpec = estimator.Spec{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.95}

func createSales(t *testing.T, pool *pgxpool.Pool, name string) {
	t.Helper()
	exec(t, pool, fmt.Sprintf(`CREATE TABLE %s (id bigserial PRIMARY KEY, sold_at timestamptz, shop text, amount numeric)`, name))
	exec(t, pool, `SELECT sidetrend.track($1::regclass, 'sold_at', 'amount', '{shop}', period => 7, harmonics => 2, horizon => 14)`, name)
}

// TestPipelineMatchesOffline inserts rows in many statements of random size
// in random order, with catch-ups at random moments, and checks that the
// forecasts equal a from-scratch fit on SELECT of the table: with the
// default batch size, and with batches of 7 changes drained by three
// transactions at once (Syncer.Workers), so that a catch-up is many full
// batches that run concurrently and often touch the same series.
func TestPipelineMatchesOffline(t *testing.T) {
	t.Parallel()
	for _, c := range []struct{ batch, workers int }{{DefaultBatchSize, DefaultWorkers}, {7, 3}} {
		t.Run(fmt.Sprintf("batch=%d/workers=%d", c.batch, c.workers), func(t *testing.T) {
			t.Parallel()
			testPipelineMatchesOffline(t, c.batch, c.workers)
		})
	}
}

func testPipelineMatchesOffline(t *testing.T, batch, workers int) {
	pool, _ := newDB(t)
	ctx := context.Background()
	rng := rand.New(rand.NewPCG(1, 1))
	createSales(t, pool, "sales")
	// Rows before the first catch-up are taken in by the backfill.
	all := salesRows(rng, 4, 90, 3)
	insertRows(t, pool, "sales", all[:100])
	rest := all[100:]
	// Shuffle within windows of about a day's rows: rows of a still pending
	// bucket arrive in any order.
	for i := 0; i < len(rest); i += 12 {
		w := rest[i:min(i+12, len(rest))]
		rng.Shuffle(len(w), func(a, b int) { w[a], w[b] = w[b], w[a] })
	}
	s := NewSyncer(pool, nil)
	s.BatchSize, s.Workers = batch, workers
	var batches atomic.Int64
	s.OnBatch = func(BatchInfo) { batches.Add(1) }
	for len(rest) > 0 {
		n := min(1+rng.IntN(40), len(rest))
		insertRows(t, pool, "sales", rest[:n])
		rest = rest[n:]
		if rng.IntN(4) == 0 {
			if err := s.CatchUp(ctx); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", salesSpec), 14)
	st := s.Stats()
	if st.Backfills != 1 || st.Changes == 0 {
		t.Errorf("stats %+v: want one backfill and some changes", st)
	}
	if st.Batches != batches.Load() {
		t.Errorf("stats count %d batches, OnBatch was called %d times", st.Batches, batches.Load())
	}
	if minBatches := st.Changes / int64(batch); st.Batches < minBatches {
		t.Errorf("%d batches for %d changes at batch size %d", st.Batches, st.Changes, batch)
	}
	var left int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&left); err != nil || left != 0 {
		t.Errorf("change log has %d rows after catch-up (err %v)", left, err)
	}
}

// TestOpenBucketWaitsForClock checks the folding rule: the newest bucket is
// folded once a later bucket has data or the clock has passed its end.
func TestOpenBucketWaitsForClock(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	day := func(d int) time.Time { return time.Date(2026, 3, 1+d, 12, 0, 0, 0, time.UTC) }
	for d := 0; d < 3; d++ {
		insertRows(t, pool, "sales", [][]any{{day(d), "a", 10.0 + float64(d)}})
	}
	s := NewSyncer(pool, nil)
	s.now = func() time.Time { return day(2) } // the clock is inside the third day
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var points int64
	var due *time.Time
	if err := pool.QueryRow(ctx, `SELECT points, pending_due FROM sidetrend.series WHERE series_key = 'a'`).Scan(&points, &due); err != nil {
		t.Fatal(err)
	}
	if points != 2 || due == nil || !due.Equal(time.Date(2026, 3, 4, 0, 0, 0, 0, time.UTC)) {
		t.Fatalf("with the third day open: points %d, pending_due %v; want 2 and 2026-03-04", points, due)
	}
	// The clock passes midnight: the due sweep folds the third day.
	s.now = func() time.Time { return day(3) }
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if err := pool.QueryRow(ctx, `SELECT points, pending_due FROM sidetrend.series WHERE series_key = 'a'`).Scan(&points, &due); err != nil {
		t.Fatal(err)
	}
	if points != 3 || due != nil {
		t.Fatalf("after the clock passed: points %d, pending_due %v; want 3 and NULL", points, due)
	}
}

// TestLaggingSidecarWaitsForTheLog checks that a bucket whose end the wall
// clock has passed is not folded while a change captured before that end
// still waits in the log (Syncer.clock): neither by the drain that claims
// the bucket's first change nor by the due sweep. Folding it would make
// the waiting change a late row and its series a replay.
func TestLaggingSidecarWaitsForTheLog(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	// Day 0 is today; day 1's rows are stamped ahead, so that day 1 ends
	// after every capture time of this test, as a bucket a lagging sidecar
	// is still reading does.
	today := time.Now().UTC().Truncate(24 * time.Hour)
	day := func(d int) time.Time { return today.AddDate(0, 0, d) }
	for d := -2; d <= 0; d++ {
		insertRows(t, pool, "sales", [][]any{{day(d).Add(12 * time.Hour), "a", 10.0 + float64(d)}})
	}
	s := NewSyncer(pool, nil)
	s.now = func() time.Time { return day(1).Add(time.Hour) } // day 0 has ended
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	state := func() (points int64, due *time.Time) {
		t.Helper()
		if err := pool.QueryRow(ctx, `SELECT points, pending_due FROM sidetrend.series WHERE series_key = 'a'`).Scan(&points, &due); err != nil {
			t.Fatal(err)
		}
		return points, due
	}
	if points, due := state(); points != 3 || due != nil {
		t.Fatalf("after the history: points %d, pending_due %v; want 3 and NULL", points, due)
	}

	// Two statements of day 1, two changes; the wall clock is two days past
	// day 1's end, and the sidecar reads one change a batch.
	insertRows(t, pool, "sales", [][]any{{day(1).Add(12 * time.Hour), "a", 20.0}})
	insertRows(t, pool, "sales", [][]any{{day(1).Add(13 * time.Hour), "a", 22.0}})
	s.now = func() time.Time { return day(4) }
	s.BatchSize, s.Workers = 1, 1
	before := s.Stats().Rebuilds
	if n, err := s.drainBatch(ctx); err != nil || n != 1 {
		t.Fatalf("first batch: %d changes, %v; want 1", n, err)
	}
	if points, due := state(); points != 3 || due == nil || !due.Equal(day(2)) {
		t.Fatalf("with a change of day 1 still in the log: points %d, pending_due %v; want 3 and %v", points, due, day(2))
	}
	if n, err := s.dueBatch(ctx); err != nil || n != 0 {
		t.Fatalf("due sweep with a change of day 1 still in the log: %d series, %v; want none", n, err)
	}

	// Once the log is read, the clock closes day 1 with both rows.
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if points, due := state(); points != 4 || due != nil {
		t.Fatalf("after the log was read: points %d, pending_due %v; want 4 and NULL", points, due)
	}
	var sum float64
	if err := pool.QueryRow(ctx, `SELECT sum FROM sidetrend.points WHERE series_key = 'a' AND bucket = (SELECT folded_through FROM sidetrend.series WHERE series_key = 'a')`).Scan(&sum); err != nil {
		t.Fatal(err)
	}
	if replays := s.Stats().Rebuilds - before; sum != 42 || replays != 0 {
		t.Fatalf("day 1 folded with sum %v after %d replays; want 42 and none", sum, replays)
	}
}

// TestRestartLosesNothing stops the sidecar between batches and checks that
// what was written while it was down is taken in on restart.
func TestRestartLosesNothing(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	rng := rand.New(rand.NewPCG(2, 2))
	rows := salesRows(rng, 3, 60, 2)
	third := len(rows) / 3
	start := func() (*Runner, chan Stats) {
		caught := make(chan Stats, 100)
		r := NewRunner(url, RunnerConfig{Poll: time.Hour, OnCaughtUp: func(s Stats) {
			select {
			case caught <- s:
			default:
			}
		}}, nil)
		if err := r.Start(ctx); err != nil {
			t.Fatal(err)
		}
		return r, caught
	}
	waitEmpty := func(caught chan Stats) {
		deadline := time.After(30 * time.Second)
		for {
			select {
			case <-caught:
				var n int
				if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&n); err != nil {
					t.Fatal(err)
				}
				if n == 0 {
					return
				}
			case <-deadline:
				t.Fatal("sidecar did not catch up within 30 s")
			}
		}
	}
	r, caught := start()
	for i := 0; i < third; i += 10 {
		insertRows(t, pool, "sales", rows[i:min(i+10, third)])
	}
	waitEmpty(caught)
	r.Stop()
	r.Stop() // idempotent
	// Written while the sidecar is down: only the change log has it.
	for i := third; i < 2*third; i += 10 {
		insertRows(t, pool, "sales", rows[i:min(i+10, 2*third)])
	}
	r, caught = start()
	waitEmpty(caught)
	for i := 2 * third; i < len(rows); i += 10 {
		insertRows(t, pool, "sales", rows[i:min(i+10, len(rows))])
	}
	waitEmpty(caught)
	r.Stop()
	compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", salesSpec), 14)
}

// TestTwoSidecarsApplyOnce runs two syncers at the same time on one change
// log, each with two workers, while rows arrive: a change applied twice would double a bucket sum
// and break the comparison with the offline fit.
func TestTwoSidecarsApplyOnce(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	rng := rand.New(rand.NewPCG(3, 3))
	rows := salesRows(rng, 5, 60, 3)
	stop := make(chan struct{})
	var wg sync.WaitGroup
	var syncers []*Syncer
	var mu sync.Mutex
	var firstErr error
	for i := 0; i < 2; i++ {
		p2, err := Connect(ctx, url)
		if err != nil {
			t.Fatal(err)
		}
		defer p2.Close()
		s := NewSyncer(p2, nil)
		// Small batches of different sizes (3 and 5 changes): many claims,
		// and each sidecar drains with its own two workers in parallel.
		s.BatchSize = 3 + 2*i
		syncers = append(syncers, s)
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				select {
				case <-stop:
					return
				default:
				}
				if err := s.CatchUp(ctx); err != nil {
					mu.Lock()
					if firstErr == nil {
						firstErr = err
					}
					mu.Unlock()
					return
				}
			}
		}()
	}
	for i := 0; i < len(rows); i += 7 {
		insertRows(t, pool, "sales", rows[i:min(i+7, len(rows))])
	}
	close(stop)
	wg.Wait()
	if firstErr != nil {
		t.Fatal(firstErr)
	}
	if err := syncers[0].CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", salesSpec), 14)
	a, b := syncers[0].Stats(), syncers[1].Stats()
	t.Logf("changes drained: %d and %d; retries %d and %d", a.Changes, b.Changes, a.Retries, b.Retries)
}

// TestRejectsKeepGoodRows puts bad rows next to good ones in one statement.
func TestRejectsKeepGoodRows(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	exec(t, pool, `INSERT INTO sales (sold_at, shop, amount) VALUES
		('2026-01-01 10:00Z', 'a', 10), ('2026-01-01 11:00Z', 'a', NULL), (NULL, 'a', 3),
		('2026-01-02 10:00Z', 'a', 'NaN'), ('infinity', 'a', 4), ('2026-01-02 10:00Z', 'a', 12)`)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	rows, err := pool.Query(ctx, `SELECT reason FROM sidetrend.rejects ORDER BY id`)
	if err != nil {
		t.Fatal(err)
	}
	reasons, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"value is NULL", "time is NULL", "value is NaN", "time is infinite"}
	if strings.Join(reasons, ",") != strings.Join(want, ",") {
		t.Errorf("rejects %q, want %q", reasons, want)
	}
	var n, sum float64
	if err := pool.QueryRow(ctx, `SELECT sum(n), sum(sum) FROM sidetrend.points`).Scan(&n, &sum); err != nil {
		t.Fatal(err)
	}
	if n != 2 || sum != 22 {
		t.Errorf("points hold n=%v sum=%v, want the two good rows: 2 and 22", n, sum)
	}
}

// TestTrackErrors checks that every bad registration is refused with an
// error that names what to change, and leaves no tracker behind.
func TestTrackErrors(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE m (at timestamptz, d date, label text, v float8, n numeric, "Odd Name" int)`)
	exec(t, pool, `CREATE VIEW mv AS SELECT * FROM m`)
	cases := []struct {
		sql, state, want string
	}{
		{`SELECT sidetrend.track('nosuch', 'at', 'v')`, "42P01", `relation "nosuch" does not exist`},
		{`SELECT sidetrend.track('m', 'when', 'v')`, "42703", `column "when" does not exist`},
		{`SELECT sidetrend.track('m', 'at', 'label')`, "42804", `not numeric`},
		{`SELECT sidetrend.track('m', 'label', 'v')`, "42804", `not date, timestamp or timestamptz`},
		{`SELECT sidetrend.track('m', 'at', 'v', agg => 'median')`, "22023", `unknown aggregate`},
		{`SELECT sidetrend.track('m', 'at', 'v', lambda => 1.3)`, "22023", `outside (0, 1]`},
		{`SELECT sidetrend.track('m', 'at', 'v', degree => 5)`, "22023", `degree 5`},
		{`SELECT sidetrend.track('m', 'at', 'v', period => 4, harmonics => 3)`, "22023", `too many`},
		{`SELECT sidetrend.track('m', 'at', 'v', period => 1, harmonics => 1)`, "22023", `too short`},
		{`SELECT sidetrend.track('m', 'at', 'v', harmonics => 2)`, "22023", `need a period`},
		{`SELECT sidetrend.track('m', 'at', 'v', tz => 'Mars/Olympus')`, "22023", `time zone`},
		// CET is a fixed offset to AT TIME ZONE but a zone with DST to Go.
		{`SELECT sidetrend.track('m', 'at', 'v', tz => 'CET')`, "22023", `time zone`},
		{`SELECT sidetrend.track('m', 'at', 'v', empty => 'carry')`, "22023", `empty`},
		{`SELECT sidetrend.track('m', 'at', 'v', key_cols => '{nokey}')`, "42703", `key column "nokey"`},
		{`SELECT sidetrend.track('m', 'at', 'v', bucket => '-1 day')`, "22023", ``},
		{`SELECT sidetrend.track('m', 'at', 'v', bucket => '1 day 2 hours')`, "22023", ``},
		{`SELECT sidetrend.track('mv', 'at', 'v')`, "42809", `is a view`},
	}
	for _, c := range cases {
		_, err := pool.Exec(ctx, c.sql)
		var pgErr *pgconn.PgError
		if !errors.As(err, &pgErr) {
			t.Errorf("%s: err %v, want SQLSTATE %s", c.sql, err, c.state)
			continue
		}
		if pgErr.SQLState() != c.state || !strings.Contains(pgErr.Message, c.want) {
			t.Errorf("%s: %s %q, want %s containing %q", c.sql, pgErr.SQLState(), pgErr.Message, c.state, c.want)
		}
		says := pgErr.Hint != "" || strings.Contains(pgErr.Message, "use ") || strings.Contains(pgErr.Message, "write ")
		if !says && pgErr.SQLState() != "42P01" {
			t.Errorf("%s: no hint saying what to change", c.sql)
		}
	}
	// A good one, then the same name again, then names that need quoting.
	exec(t, pool, `SELECT sidetrend.track('m', 'at', 'v')`)
	_, err := pool.Exec(ctx, `SELECT sidetrend.track('m', 'd', 'n')`)
	if err == nil || !strings.Contains(err.Error(), "already exists") {
		t.Errorf("duplicate name: %v", err)
	}
	exec(t, pool, `SELECT sidetrend.track('m', 'd', 'Odd Name', name => 'odd one')`)
	var n int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.trackers`).Scan(&n); err != nil || n != 2 {
		t.Errorf("%d trackers (err %v), want 2", n, err)
	}
}

// TestDrainAllWaitsForHeldChanges: a transaction (standing in for a sidecar
// killed a moment ago, whose backend still holds its claim) locks one change
// row. CatchUp with DrainAll must not return while the row is held, and
// drains it once the lock goes; without DrainAll, CatchUp skips it.
func TestDrainAllWaitsForHeldChanges(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE meter (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('meter', 'at', 'v', horizon => 2)`)
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil { // the backfill
		t.Fatal(err)
	}
	exec(t, pool, `INSERT INTO meter SELECT '2026-01-01'::timestamptz + d * interval '1 day', d FROM generate_series(0, 9) d`)
	holder, err := pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer holder.Rollback(ctx)
	if _, err := holder.Exec(ctx, `SELECT id FROM sidetrend.changes ORDER BY id LIMIT 1 FOR UPDATE`); err != nil {
		t.Fatal(err)
	}
	count := func() int {
		var n int
		if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return n
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if n := count(); n != 1 {
		t.Fatalf("without DrainAll: %d changes left, want the 1 held", n)
	}
	s.DrainAll = true
	done := make(chan error, 1)
	go func() { done <- s.CatchUp(ctx) }()
	select {
	case err := <-done:
		t.Fatalf("CatchUp with DrainAll returned (%v) while a change was held", err)
	case <-time.After(300 * time.Millisecond):
	}
	if err := holder.Rollback(ctx); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-done:
		if err != nil {
			t.Fatal(err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("CatchUp with DrainAll did not return after the lock went")
	}
	if n := count(); n != 0 {
		t.Errorf("after DrainAll: %d changes left, want 0", n)
	}
}

// TestForecastBoundsFromStoredSE: the forecasts view forms every interval
// bound from the stored forecast, standard error and t quantile (migration
// 00005) with the operations the estimator uses, forecast -+ t SE, and so does
// the forecast history for the forecast issued at the newest folded bucket
// (migration 00006). Each bound must equal the estimator's own Forecast of
// the stored state: to the last bit on amd64, where Go fuses no
// multiply-add; within 1e-15 elsewhere.
func TestForecastBoundsFromStoredSE(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(5, 5)), 3, 40, 2))
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	tol := 0.0
	if runtime.GOARCH != "amd64" {
		tol = 1e-15
	}
	rows, err := pool.Query(ctx, `
		SELECT s.series_key, s.state, f.horizon, f.lower80, f.upper80, f.lower95, f.upper95, f.cum_lower95, f.cum_upper95,
		       h.forecast, h.lower95, h.upper95
		FROM sidetrend.forecasts f
		JOIN sidetrend.series s ON s.series_key = f.series_key
		JOIN sidetrend.forecast_history h
		  ON h.series_key = f.series_key AND h.issued_for = f.as_of AND h.horizon = f.horizon
		ORDER BY 1, 3`)
	if err != nil {
		t.Fatal(err)
	}
	defer rows.Close()
	checked := 0
	for rows.Next() {
		var key string
		var blob []byte
		var h int
		var got [9]float64
		if err := rows.Scan(&key, &blob, &h, &got[0], &got[1], &got[2], &got[3], &got[4], &got[5], &got[6], &got[7], &got[8]); err != nil {
			t.Fatal(err)
		}
		st, err := estimator.DecodeFor(blob, salesSpec)
		if err != nil {
			t.Fatal(err)
		}
		fc, err := st.Forecast(14)
		if err != nil {
			t.Fatal(err)
		}
		i := h - 1
		want := [9]float64{fc.Lower80[i], fc.Upper80[i], fc.Lower95[i], fc.Upper95[i], fc.CumLower95[i], fc.CumUpper95[i],
			fc.Forecast[i], fc.Lower95[i], fc.Upper95[i]}
		for k := range want {
			if d := math.Abs(got[k] - want[k]); d > tol*math.Abs(want[k]) {
				t.Errorf("%s h=%d value %d (6-8: history): view %v, estimator %v", key, h, k, got[k], want[k])
			}
		}
		checked++
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if checked != 3*14 {
		t.Errorf("checked %d forecast rows, want %d (3 shops, horizon 14)", checked, 3*14)
	}
}

// TestBucketEndsSQLFallback: the drain takes when a bucket ends from the Go
// calendar and asks sidetrend.bucket_start (pointsSQL with sql_ends) only
// for a tracker whose zone Go cannot load. Both must give the same instant
// for every point, in zones with and without daylight saving time and for
// day, week, month and hour buckets.
func TestBucketEndsSQLFallback(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE readings (at timestamptz, k text, v float8)`)
	exec(t, pool, `INSERT INTO readings SELECT '2025-10-20 00:30Z'::timestamptz + h * interval '7 hours', 'a', h FROM generate_series(0, 400) h`)
	for _, c := range []struct{ name, bucket, tz string }{
		{"daily_utc", "1 day", "UTC"},
		{"weekly_berlin", "7 days", "Europe/Berlin"},
		{"monthly_sao_paulo", "1 month", "America/Sao_Paulo"},
		{"hourly_kolkata", "1 hour", "Asia/Kolkata"},
	} {
		exec(t, pool, `SELECT sidetrend.track('readings', 'at', 'v', '{k}', bucket => $1::interval, tz => $2, name => $3, horizon => 2)`, c.bucket, c.tz, c.name)
	}
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	trackers, err := LoadTrackers(ctx, pool)
	if err != nil {
		t.Fatal(err)
	}
	var tids []int32
	for id, tr := range trackers {
		if tr.calErr != nil {
			t.Fatalf("tracker %s: no Go calendar: %v", tr.Name, tr.calErr)
		}
		tids = append(tids, int32(id))
	}
	keys := make([]string, len(tids))
	after := make([]int64, len(tids))
	sqlEnds := make([]bool, len(tids))
	for i := range tids {
		keys[i], after[i], sqlEnds[i] = "a", math.MinInt64, true
	}
	rows, err := pool.Query(ctx, pointsSQL, tids, keys, after, sqlEnds)
	if err != nil {
		t.Fatal(err)
	}
	defer rows.Close()
	checked := map[string]int{}
	for rows.Next() {
		var tid int32
		var key string
		var p point
		if err := rows.Scan(&tid, &key, &p.bucket, &p.n, &p.sum, &p.min, &p.max, &p.last, &p.ends); err != nil {
			t.Fatal(err)
		}
		tr := trackers[int(tid)]
		want, _ := tr.bucketEnd(p.bucket)
		if p.ends == nil || !p.ends.Equal(want) {
			t.Errorf("%s bucket %d: sidetrend.bucket_start says it ends %v, the Go calendar %v", tr.Name, p.bucket, p.ends, want)
		}
		checked[tr.Name]++
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if len(checked) != 4 || checked["hourly_kolkata"] < 400 || checked["monthly_sao_paulo"] < 4 {
		t.Errorf("points checked per tracker: %v; want all four trackers, every point", checked)
	}
}

// TestOpenBucketsMatchOffline drains rows as they arrive live: the clock is
// at the newest row inserted, so each series has an open bucket (today)
// that later batches add to, folded from the points the claim returns, and
// that a later day's rows close, which loads the open bucket's point. At
// the end the clock passes every bucket and the forecasts must equal a
// from-scratch fit, as in TestPipelineMatchesOffline; on the way, a series
// never folds its open bucket.
func TestOpenBucketsMatchOffline(t *testing.T) {
	t.Parallel()
	for _, c := range []struct{ batch, workers int }{{DefaultBatchSize, DefaultWorkers}, {5, 3}} {
		t.Run(fmt.Sprintf("batch=%d/workers=%d", c.batch, c.workers), func(t *testing.T) {
			t.Parallel()
			pool, _ := newDB(t)
			ctx := context.Background()
			rng := rand.New(rand.NewPCG(3, 7))
			createSales(t, pool, "sales")
			all := salesRows(rng, 4, 40, 4)
			slices.SortFunc(all, func(a, b []any) int { return a[0].(time.Time).Compare(b[0].(time.Time)) })
			var clock atomic.Int64 // the Syncer's now, in Unix microseconds
			s := NewSyncer(pool, nil)
			s.BatchSize, s.Workers = c.batch, c.workers
			s.now = func() time.Time { return time.UnixMicro(clock.Load()) }
			for rest := all; len(rest) > 0; {
				n := min(1+rng.IntN(12), len(rest))
				insertRows(t, pool, "sales", rest[:n])
				clock.Store(rest[n-1][0].(time.Time).UnixMicro())
				rest = rest[n:]
				if rng.IntN(3) != 0 {
					continue
				}
				if err := s.CatchUp(ctx); err != nil {
					t.Fatal(err)
				}
				// Every bucket folded has ended by the clock.
				var early int
				if err := pool.QueryRow(ctx, `
					SELECT count(*) FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id
					WHERE sidetrend.bucket_start(s.folded_through + 1, t.bucket, t.tz) > $1`,
					time.UnixMicro(clock.Load())).Scan(&early); err != nil {
					t.Fatal(err)
				}
				if early != 0 {
					t.Fatalf("%d series folded a bucket that has not ended at %s", early, time.UnixMicro(clock.Load()).UTC())
				}
			}
			clock.Store(time.Now().UnixMicro())
			if err := s.CatchUp(ctx); err != nil {
				t.Fatal(err)
			}
			compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", salesSpec), 14)
			st := s.Stats()
			if st.FromClaim == 0 || st.Loaded == 0 {
				t.Errorf("stats %+v: want some series handled with the claimed points alone and some with loaded points", st)
			}
		})
	}
}
