package pgsync

// Benchmarks of capture, drain and latency against a production-like
// Postgres. Run them with, for example,
//
//	go test -run '^$' -bench Capture -benchtime 8x ./pgsync/
//	go test -run '^$' -bench Pipeline -benchtime 2x ./pgsync/
//	go test -run '^$' -bench Latency -benchtime 3000x ./pgsync/
//
// (a pipeline op at 10,000 series takes seconds; the latency percentiles
// need thousands of commits). The machine is small and shared: compare
// numbers within one run, and run more than once.
//
// They never run in a plain `go test`: nothing here is a Test function, and
// the benchmark server is started by the benchmarks themselves.
//
// The test cluster of pgtest runs with fsync=off, which flatters every
// commit. Each top-level benchmark below therefore starts its own private
// cluster with durability on (fsync, synchronous_commit and
// full_page_writes on, every other setting Postgres' default but
// max_connections) and stops it when its sub-benchmarks are done: a
// top-level benchmark that only calls b.Run is run exactly once per -count,
// so its b.Cleanup runs after the last sub-benchmark, and nothing needs a
// hook in TestMain. A killed benchmark binary takes the server with it
// (pglocal starts it with a parent-death signal, and removes the stale
// temporary directory on its next start).
//
// SIDETREND_BENCH_DATABASE_URL points the benchmarks at an existing server
// instead (its role must be allowed to create databases).
// SIDETREND_BENCH_STATEMENTS=1 loads pg_stat_statements (track = all, so the
// statements inside the capture triggers count too) and logs, after each
// benchmark, the statements that took the most server time; its bookkeeping
// costs a few per cent, so compare numbers only between runs with the same
// setting. SIDETREND_BENCH_SETTINGS=name=value,... adds server settings
// (for example auto_explain's), after the ones above.

import (
	"context"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"net/url"
	"os"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/pglocal"
)

const (
	benchEnvURL        = "SIDETREND_BENCH_DATABASE_URL"
	benchEnvStatements = "SIDETREND_BENCH_STATEMENTS"
	benchEnvSettings   = "SIDETREND_BENCH_SETTINGS"
)

// benchSettings are what makes the benchmark server production-like: the
// durability settings at their (default) safe values, spelled out so that a
// change of pglocal's defaults cannot quietly turn them off.
var benchSettings = map[string]string{
	"fsync":              "on",
	"synchronous_commit": "on",
	"full_page_writes":   "on",
}

// benchTimeout bounds setup steps and waits for the sidecar. Generous: the
// machine is small and shared, and a miss means a broken benchmark, not a
// slow one.
const benchTimeout = 5 * time.Minute

var benchDBSeq atomic.Int64

// benchServer returns the admin URL of a production-like server for one
// top-level benchmark, started now and stopped when b ends.
func benchServer(b *testing.B) string {
	b.Helper()
	if u := os.Getenv(benchEnvURL); u != "" {
		return u
	}
	settings := make(map[string]string, len(benchSettings)+2)
	for k, v := range benchSettings {
		settings[k] = v
	}
	if os.Getenv(benchEnvStatements) != "" {
		settings["shared_preload_libraries"] = "pg_stat_statements"
		settings["pg_stat_statements.track"] = "all"
	}
	for _, kv := range strings.Split(os.Getenv(benchEnvSettings), ",") {
		name, value, ok := strings.Cut(strings.TrimSpace(kv), "=")
		if !ok {
			if kv != "" {
				b.Fatalf("%s: %q is not name=value", benchEnvSettings, kv)
			}
			continue
		}
		settings[strings.TrimSpace(name)] = strings.TrimSpace(value)
	}
	ctx, cancel := context.WithTimeout(context.Background(), benchTimeout)
	defer cancel()
	srv, err := pglocal.Start(ctx, pglocal.Config{Settings: settings})
	if err != nil {
		b.Fatalf("start the benchmark server: %v", err)
	}
	b.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), benchTimeout)
		defer cancel()
		if err := srv.Stop(ctx); err != nil {
			b.Errorf("stop the benchmark server: %v", err)
		}
	})
	return srv.URL("postgres")
}

// newBenchDB creates a fresh migrated database on the server at admin and
// returns a pool on it and its URL; the database is dropped when b ends.
func newBenchDB(b *testing.B, admin string) (*pgxpool.Pool, string) {
	b.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), benchTimeout)
	defer cancel()
	conn, err := pgx.Connect(ctx, admin)
	if err != nil {
		b.Fatalf("connect to the benchmark server: %v", err)
	}
	defer conn.Close(context.Background())
	name := fmt.Sprintf("bench_%d_%d", os.Getpid(), benchDBSeq.Add(1))
	if _, err := conn.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{name}.Sanitize()); err != nil {
		b.Fatalf("create database %s: %v", name, err)
	}
	b.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), benchTimeout)
		defer cancel()
		conn, err := pgx.Connect(ctx, admin)
		if err != nil {
			b.Errorf("drop database %s: %v", name, err)
			return
		}
		defer conn.Close(ctx)
		if _, err := conn.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)"); err != nil {
			b.Errorf("drop database %s: %v", name, err)
		}
	})
	u, err := url.Parse(admin)
	if err != nil {
		b.Fatal(err)
	}
	u.Path, u.RawPath = "/"+name, ""
	dbURL := u.String()
	return migratedPool(b, ctx, dbURL), dbURL
}

func benchExec(b *testing.B, pool *pgxpool.Pool, sql string, args ...any) {
	b.Helper()
	if _, err := pool.Exec(context.Background(), sql, args...); err != nil {
		b.Fatalf("%s: %v", sql, err)
	}
}

// statementProfile resets pg_stat_statements and returns a function that
// prints the statements of this database that took the most server time
// since, and each sidetrend table's row writes.
// Both do nothing unless SIDETREND_BENCH_STATEMENTS is set.
func statementProfile(b *testing.B, pool *pgxpool.Pool) func() {
	b.Helper()
	if os.Getenv(benchEnvStatements) == "" {
		return func() {}
	}
	benchExec(b, pool, `CREATE EXTENSION IF NOT EXISTS pg_stat_statements`)
	benchExec(b, pool, `SELECT pg_stat_statements_reset()`)
	return func() {
		rows, err := pool.Query(context.Background(), `
			SELECT calls, total_exec_time, rows, left(regexp_replace(query, '\s+', ' ', 'g'), 160)
			FROM pg_stat_statements
			WHERE dbid = (SELECT oid FROM pg_database WHERE datname = current_database())
			ORDER BY total_exec_time DESC LIMIT 12`)
		if err != nil {
			b.Errorf("read pg_stat_statements: %v", err)
			return
		}
		defer rows.Close()
		var sb strings.Builder
		sb.WriteString("server time by statement (pg_stat_statements, track = all):\n")
		for rows.Next() {
			var calls, n int64
			var ms float64
			var q string
			if err := rows.Scan(&calls, &ms, &n, &q); err != nil {
				b.Errorf("read pg_stat_statements: %v", err)
				return
			}
			fmt.Fprintf(&sb, "  %10.1f ms %8d calls %10d rows  %s\n", ms, calls, n, q)
		}
		if err := rows.Err(); err != nil {
			b.Errorf("read pg_stat_statements: %v", err)
			return
		}
		// Row writes per table since the database was made (HOT updates
		// need no index entry; the statistics lag by up to a second).
		trows, err := pool.Query(context.Background(), `
			SELECT relname, n_tup_ins, n_tup_upd, n_tup_hot_upd, n_tup_del
			FROM pg_stat_user_tables WHERE schemaname = 'sidetrend' AND n_tup_ins + n_tup_upd + n_tup_del > 0
			ORDER BY relname`)
		if err != nil {
			b.Errorf("read pg_stat_user_tables: %v", err)
			return
		}
		defer trows.Close()
		fmt.Fprint(os.Stderr, sb.String())
		sb.Reset()
		sb.WriteString("row writes by table (pg_stat_user_tables, since the database was made):\n")
		for trows.Next() {
			var rel string
			var ins, upd, hot, del int64
			if err := trows.Scan(&rel, &ins, &upd, &hot, &del); err != nil {
				b.Errorf("read pg_stat_user_tables: %v", err)
				return
			}
			fmt.Fprintf(&sb, "  %-16s %10d inserted %10d updated (%d HOT) %10d deleted\n", rel, ins, upd, hot, del)
		}
		// To standard error: the testing package cuts a benchmark's log
		// after a few lines.
		fmt.Fprint(os.Stderr, sb.String())
	}
}

// valuesSQL is a multi-row INSERT of rows rows into table's cols, with
// numbered parameters.
func valuesSQL(table string, cols []string, rows int) string {
	var sb strings.Builder
	fmt.Fprintf(&sb, "INSERT INTO %s (%s) VALUES ", table, strings.Join(cols, ", "))
	k := 1
	for i := 0; i < rows; i++ {
		if i > 0 {
			sb.WriteString(", ")
		}
		sb.WriteByte('(')
		for j := range cols {
			if j > 0 {
				sb.WriteString(", ")
			}
			fmt.Fprintf(&sb, "$%d", k)
			k++
		}
		sb.WriteByte(')')
	}
	return sb.String()
}

// flatten lays rows out as the arguments of valuesSQL.
func flatten(rows [][]any) []any {
	out := make([]any, 0, len(rows)*len(rows[0]))
	for _, r := range rows {
		out = append(out, r...)
	}
	return out
}

// cents is v rounded to cents as a numeric. The benchmarks pass numeric
// values in this form, as an application holding money in exact decimals
// would: pgx converts a float64 to numeric by formatting and parsing it,
// which costs more client time than the server spends on the row.
func cents(v float64) pgtype.Numeric {
	return pgtype.Numeric{Int: big.NewInt(int64(math.Round(v * 100))), Exp: -2, Valid: true}
}

func onOff(on bool) string {
	if on {
		return "on"
	}
	return "off"
}

// --- Capture -----------------------------------------------------------

// captureSeries, captureDays and captureRowCount shape the capture load:
// the brief asks for 100,000 rows across 10 series in a few days.
const (
	captureSeries   = 10
	captureDays     = 3
	captureRowCount = 100_000
	stmtRows        = 1_000 // rows per multi-row INSERT statement
)

var salesCols = []string{"sold_at", "shop", "amount"}

// captureRows is a till log of captureSeries shops over captureDays days,
// in time order as a till writes it, amounts with cents.
func captureRows(rng *rand.Rand) [][]any {
	start := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	step := time.Duration(captureDays) * 24 * time.Hour / captureRowCount
	out := make([][]any, captureRowCount)
	for i := range out {
		ts := start.Add(time.Duration(i)*step + time.Duration(rng.IntN(int(step))))
		shop := rng.IntN(captureSeries)
		v := 20 + 5*float64(shop) + 4*rng.NormFloat64()
		out[i] = []any{ts, fmt.Sprintf("shop %02d", shop), cents(v)}
	}
	return out
}

// createCaptureTable makes the source table; with track it is registered
// with the model of the pipeline tests, which installs the capture triggers.
func createCaptureTable(b *testing.B, pool *pgxpool.Pool, name string, track bool) {
	b.Helper()
	benchExec(b, pool, fmt.Sprintf(`CREATE TABLE %s (id bigserial PRIMARY KEY, sold_at timestamptz, shop text, amount numeric)`, name))
	if track {
		benchExec(b, pool, `SELECT sidetrend.track($1::regclass, 'sold_at', 'amount', '{shop}', period => 7, harmonics => 2, horizon => 14)`, name)
	}
}

func copyRows(b *testing.B, pool *pgxpool.Pool, table string, rows [][]any) {
	n, err := pool.CopyFrom(context.Background(), pgx.Identifier{table}, salesCols, pgx.CopyFromRows(rows))
	if err != nil {
		b.Fatalf("copy into %s: %v", table, err)
	}
	if n != int64(len(rows)) {
		b.Fatalf("copy into %s: %d rows, want %d", table, n, len(rows))
	}
}

// BenchmarkCapture measures source-table write throughput without and with
// the tracker's statement triggers (the change log insert, the reject check
// and one pg_notify per statement). No sidecar runs: this is the cost the
// writers pay. The paired case alternates untracked and tracked COPYs
// within one benchmark, so that the ratio it reports is not skewed by the
// machine's load drifting between two sub-benchmarks.
func BenchmarkCapture(b *testing.B) {
	admin := benchServer(b)
	rows := captureRows(rand.New(rand.NewPCG(1, 1)))

	b.Run("copy", func(b *testing.B) {
		for _, on := range []bool{false, true} {
			b.Run("trigger="+onOff(on), func(b *testing.B) {
				pool, _ := newBenchDB(b, admin)
				createCaptureTable(b, pool, "sales", on)
				report := statementProfile(b, pool)
				b.ReportAllocs()
				n := 0
				for b.Loop() {
					b.StopTimer()
					benchExec(b, pool, `TRUNCATE sales, sidetrend.changes`)
					b.StartTimer()
					copyRows(b, pool, "sales", rows)
					n++
				}
				b.ReportMetric(float64(n*len(rows))/b.Elapsed().Seconds(), "rows/s")
				report()
			})
		}
		b.Run("paired", func(b *testing.B) {
			pool, _ := newBenchDB(b, admin)
			createCaptureTable(b, pool, "plain", false)
			createCaptureTable(b, pool, "sales", true)
			b.ReportAllocs()
			var off, on time.Duration
			n := 0
			for b.Loop() {
				b.StopTimer()
				benchExec(b, pool, `TRUNCATE plain, sales, sidetrend.changes`)
				b.StartTimer()
				// Alternate which goes first, so that neither always
				// follows the other's checkpoint or autovacuum work.
				order := []string{"plain", "sales"}
				if n%2 == 1 {
					order[0], order[1] = order[1], order[0]
				}
				for _, table := range order {
					began := time.Now()
					copyRows(b, pool, table, rows)
					if table == "plain" {
						off += time.Since(began)
					} else {
						on += time.Since(began)
					}
				}
				n++
			}
			b.ReportMetric(float64(n*len(rows))/off.Seconds(), "off-rows/s")
			b.ReportMetric(float64(n*len(rows))/on.Seconds(), "on-rows/s")
			b.ReportMetric(on.Seconds()/off.Seconds(), "overhead-x")
		})
	})

	b.Run("insert1000", func(b *testing.B) {
		sql := valuesSQL("sales", salesCols, stmtRows)
		chunks := make([][]any, 0, len(rows)/stmtRows)
		for i := 0; i+stmtRows <= len(rows); i += stmtRows {
			chunks = append(chunks, flatten(rows[i:i+stmtRows]))
		}
		for _, on := range []bool{false, true} {
			b.Run("trigger="+onOff(on), func(b *testing.B) {
				pool, _ := newBenchDB(b, admin)
				createCaptureTable(b, pool, "sales", on)
				report := statementProfile(b, pool)
				ctx := context.Background()
				b.ReportAllocs()
				n := 0
				for b.Loop() {
					if _, err := pool.Exec(ctx, sql, chunks[n%len(chunks)]...); err != nil {
						b.Fatal(err)
					}
					n++
				}
				b.ReportMetric(float64(n*stmtRows)/b.Elapsed().Seconds(), "rows/s")
				report()
			})
		}
	})
}

// --- Pipeline ----------------------------------------------------------

// kioskCols and the kiosk table are the pipeline's source: many kiosks,
// each posting takings, bucketed by day.
var kioskCols = []string{"kiosk", "day", "takings"}

// kioskWarmDays is how much history each series has before the timer
// starts: 14 days is more than the p = 6 parameters of the model (local
// linear trend plus two weekly harmonics), so every series is ready and
// every batch computes and writes forecasts, as in steady operation.
const kioskWarmDays = 14

// kiosks is a database of n kiosks whose bucket 0 starts at origin, with
// buckets of step: a day unless newKiosksEvery says otherwise.
type kiosks struct {
	pool   *pgxpool.Pool
	dbURL  string
	rng    *rand.Rand
	n      int
	origin time.Time
	step   time.Duration
}

// day is bucket d's takings of every kiosk, in kiosk order, each at a
// random time of the trading day (of the bucket, if shorter than a day);
// at, if not zero, is the time of every row.
func (k *kiosks) day(d int, at time.Time) [][]any { return k.rows(d, 0, k.n, at) }

// rows is day (bucket d) for kiosks lo up to hi only.
func (k *kiosks) rows(d, lo, hi int, at time.Time) [][]any {
	out := make([][]any, 0, hi-lo)
	start := k.origin.Add(time.Duration(d) * k.step)
	for i := lo; i < hi; i++ {
		v := 300 + float64(i%50) + 0.2*float64(d) + 40*math.Sin(2*math.Pi*float64(d)/7) + 15*k.rng.NormFloat64()
		ts := at
		switch {
		case !ts.IsZero():
		case k.step == 24*time.Hour:
			ts = start.Add(time.Duration(8*3600+k.rng.IntN(12*3600)) * time.Second)
		default:
			ts = start.Add(time.Duration(k.rng.Int64N(int64(k.step))))
		}
		out = append(out, []any{fmt.Sprintf("kiosk %05d", i), ts, cents(v)})
	}
	return out
}

// newKiosks makes a database with n kiosks' warm-up history from origin on,
// tracked with daily buckets and caught up: every series has a ready state.
func newKiosks(b *testing.B, admin string, n int, origin time.Time) *kiosks {
	return newKiosksEvery(b, admin, n, origin, 24*time.Hour)
}

// newKiosksEvery is newKiosks with buckets of step (a whole number of
// seconds).
func newKiosksEvery(b *testing.B, admin string, n int, origin time.Time, step time.Duration) *kiosks {
	b.Helper()
	pool, dbURL := newBenchDB(b, admin)
	k := &kiosks{pool: pool, dbURL: dbURL, rng: rand.New(rand.NewPCG(1, 1)), n: n, origin: origin, step: step}
	ctx := context.Background()
	benchExec(b, pool, `CREATE TABLE kiosk_takings (id bigserial PRIMARY KEY, kiosk text NOT NULL, day timestamptz NOT NULL, takings numeric NOT NULL)`)
	var warm [][]any
	for d := 0; d < kioskWarmDays; d++ {
		warm = append(warm, k.day(d, time.Time{})...)
	}
	if _, err := pool.CopyFrom(ctx, pgx.Identifier{"kiosk_takings"}, kioskCols, pgx.CopyFromRows(warm)); err != nil {
		b.Fatal(err)
	}
	bucket := "1 day"
	if step != 24*time.Hour {
		bucket = fmt.Sprintf("%d seconds", int64(step/time.Second))
	}
	benchExec(b, pool, `SELECT sidetrend.track('kiosk_takings', 'day', 'takings', '{kiosk}', bucket => $1::interval, period => 7, harmonics => 2, horizon => 14, span => '10000 years')`, bucket)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		b.Fatal(err)
	}
	k.check(b, kioskWarmDays)
	benchExec(b, pool, `VACUUM ANALYZE`)
	return k
}

// insert writes rows in statements of stmtRows rows, as an application
// batching its writes would.
func (k *kiosks) insert(b *testing.B, rows [][]any) {
	ctx := context.Background()
	sql := valuesSQL("kiosk_takings", kioskCols, stmtRows)
	for i := 0; i < len(rows); i += stmtRows {
		chunk := rows[i:min(i+stmtRows, len(rows))]
		q := sql
		if len(chunk) != stmtRows {
			q = valuesSQL("kiosk_takings", kioskCols, len(chunk))
		}
		if _, err := k.pool.Exec(ctx, q, flatten(chunk)...); err != nil {
			b.Fatal(err)
		}
	}
}

// check fails b unless every kiosk has a ready series that has folded
// exactly days points (any number when days < 0) and the change log is
// empty: a benchmark that lost or skipped work would report a rate for
// something else.
func (k *kiosks) check(b *testing.B, days int) {
	b.Helper()
	pool, n := k.pool, k.n
	var series, minPoints, maxPoints, pending, ready int64
	err := pool.QueryRow(context.Background(), `
		SELECT count(*), coalesce(min(points), 0), coalesce(max(points), 0), count(*) FILTER (WHERE ready),
		       (SELECT count(*) FROM sidetrend.changes)
		FROM sidetrend.series`).Scan(&series, &minPoints, &maxPoints, &ready, &pending)
	if err != nil {
		b.Fatal(err)
	}
	if days < 0 {
		minPoints, maxPoints, days = 0, 0, 0
	}
	if series != int64(n) || minPoints != int64(days) || maxPoints != int64(days) || ready != int64(n) || pending != 0 {
		b.Fatalf("after the run: %d series (%d ready) with %d..%d points and %d pending changes; want %d ready series with %d points each and no pending change",
			series, ready, minPoints, maxPoints, pending, n, days)
	}
}

// drainCounter counts the change rows a sidecar has committed, from its
// OnBatch hook, and lets a benchmark wait for a count.
type drainCounter struct {
	changes atomic.Int64
	wake    chan struct{}
}

func newDrainCounter() *drainCounter { return &drainCounter{wake: make(chan struct{}, 1)} }

func (c *drainCounter) onBatch(bi BatchInfo) {
	c.changes.Add(int64(bi.Changes))
	select {
	case c.wake <- struct{}{}:
	default:
	}
}

// waitFor blocks until at least n changes are drained, failing b after
// benchTimeout.
func (c *drainCounter) waitFor(b *testing.B, n int64) {
	deadline := time.NewTimer(benchTimeout)
	defer deadline.Stop()
	for c.changes.Load() < n {
		select {
		case <-c.wake:
		case <-deadline.C:
			b.Fatalf("the sidecar drained %d of %d changes within %s", c.changes.Load(), n, benchTimeout)
		}
	}
}

// startBenchRunner starts a Runner on dbURL with OnBatch hooked to onBatch
// and waits for its first catch-up; it is stopped when b ends.
func startBenchRunner(b *testing.B, dbURL string, onBatch func(BatchInfo)) {
	b.Helper()
	caught := make(chan struct{}, 1)
	r := NewRunner(dbURL, RunnerConfig{
		Poll:    5 * time.Second, // the default: wake-ups come from NOTIFY
		OnBatch: onBatch,
		OnCaughtUp: func(Stats) {
			select {
			case caught <- struct{}{}:
			default:
			}
		},
	}, nil)
	if err := r.Start(context.Background()); err != nil {
		b.Fatal(err)
	}
	b.Cleanup(r.Stop)
	select {
	case <-caught:
	case <-time.After(benchTimeout):
		b.Fatalf("the sidecar did not finish its first catch-up within %s", benchTimeout)
	}
}

// BenchmarkPipeline measures rows per second through the whole sidecar:
// source INSERTs (1,000-row statements, each of distinct kiosks), capture
// triggers, change log, drain into points, state updates and forecast
// arrays written.
//
// mode=closed: each op writes one day for every series while an
// in-process Runner, woken by NOTIFY, drains concurrently. The ops follow
// each other without waiting for the sidecar, as a busy source writes, and
// the timer stops when the sidecar has committed every change of every op:
// rows/s is the rate of a stream the sidecar keeps up with (a sidecar
// slower than the writer shows as a change log that grows until the end,
// and the time to drain it counts). (Until 2026-12-02 each op waited for
// its own day to be drained, which added a drain's tail to every op: 10 %
// to 30 % fewer rows/s at 10,000 series, measured.) The days are long
// past, so every bucket is closed when it arrives and each source row is
// folded into its series' state by the batch that claims it: the heaviest
// case, one fold, one forecast and one history row per source row.
//
// mode=open: the same, but every row is stamped now, in today's still open
// bucket: each row adds to its bucket's aggregate and nothing is folded
// (until midnight). Most rows of a live source are of this kind: 20,000
// rows/s over 10,000 series with daily buckets is 172,800 rows per series
// and bucket, one of which closes the bucket. The first op moves every
// series from the warm-up's last day to today (one row write each), as
// midnight does.
//
// mode=backlog: each op first writes backlogRows rows of past days with no
// sidecar running (timer stopped), then times one Syncer.CatchUp that
// drains them all: the drain rate with a full log, as after an outage or a
// bulk load.
//
// No row is late (before its series' newest folded bucket): a late row
// means a replay, which is not what these benchmarks measure.
func BenchmarkPipeline(b *testing.B) {
	admin := benchServer(b)
	// backlogRows is the backlog an op drains: ten full batches
	// (DefaultBatchSize change rows each), so that a drain is mostly full batches.
	const backlogRows = 10 * DefaultBatchSize
	// past is day 0 of the past-days cases: any Monday long gone.
	past := time.Date(2010, 1, 4, 0, 0, 0, 0, time.UTC)
	// today is the start of the current UTC day, the open bucket of mode=open.
	today := time.Now().UTC().Truncate(24 * time.Hour)
	for _, n := range []int{1_000, 10_000} {
		b.Run(fmt.Sprintf("series=%d", n), func(b *testing.B) {
			for _, mode := range []string{"closed", "open"} {
				b.Run("mode="+mode, func(b *testing.B) {
					origin := past
					if mode == "open" {
						origin = today.AddDate(0, 0, -kioskWarmDays) // the warm-up ends yesterday
					}
					k := newKiosks(b, admin, n, origin)
					counter := newDrainCounter()
					startBenchRunner(b, k.dbURL, counter.onBatch)
					report := statementProfile(b, k.pool)
					b.ReportAllocs()
					day, target := kioskWarmDays, int64(0)
					b.ResetTimer()
					// The classic loop, not b.Loop: the timer must run on
					// after the last op, until the sidecar has caught up.
					for i := 0; i < b.N; i++ {
						at := time.Time{}
						if mode == "open" {
							at = time.Now()
						}
						k.insert(b, k.day(day, at))
						if mode == "closed" {
							day++
						}
						target += int64(n) // one change row per row: each statement holds distinct kiosks
					}
					counter.waitFor(b, target)
					b.StopTimer()
					b.ReportMetric(float64(target)/b.Elapsed().Seconds(), "rows/s")
					report()
					if mode == "closed" {
						k.check(b, day)
					} else {
						k.check(b, -1)
					}
				})
			}
			b.Run("mode=backlog", func(b *testing.B) {
				k := newKiosks(b, admin, n, past)
				s := NewSyncer(k.pool, nil)
				days := max(1, backlogRows/n)
				report := statementProfile(b, k.pool)
				b.ReportAllocs()
				day := kioskWarmDays
				ctx := context.Background()
				for b.Loop() {
					b.StopTimer()
					for d := day; d < day+days; d++ {
						k.insert(b, k.day(d, time.Time{}))
					}
					day += days
					b.StartTimer()
					if err := s.CatchUp(ctx); err != nil {
						b.Fatal(err)
					}
				}
				rows := float64(day-kioskWarmDays) * float64(n)
				b.ReportMetric(rows/b.Elapsed().Seconds(), "rows/s")
				report()
				k.check(b, day)
			})
		})
	}
}

// --- Stream ------------------------------------------------------------

// The live source of BenchmarkStream: streamRows rows a commit, one commit
// every streamTick, is the brief's 20,000 rows/s; the minute buckets are
// the shortest bucket a short-term forecast is commonly kept for (common
// practice), so every kiosk closes a bucket once a minute.
const (
	streamSeries = 10_000
	streamRows   = stmtRows
	streamTick   = 50 * time.Millisecond
	streamSample = 100 * time.Millisecond
)

// BenchmarkStream runs a live source at 20,000 rows/s over 10,000 kiosks
// with minute buckets, in real time: a writer commits streamRows rows every
// streamTick, stamped now, the kiosks in turn; an in-process Runner, woken
// by NOTIFY, keeps up with it. Every minute each kiosk's first row of the
// new minute closes its bucket, so one row in 120 is folded with its
// bucket (10,000 folds a minute, in a burst), the rest add to open
// buckets: what a sustained stream at this rate does. (mode=open and
// mode=closed of BenchmarkPipeline are the two kinds of row alone, at the
// highest rate the sidecar drains them.)
//
// One op is one commit. The sidecar keeps up if the change log stays
// short and its oldest change stays young: a sampler reads both every
// streamSample, and lag-p99-ms is the 99th percentile of the oldest
// waiting change's age (from its capture to now; forecasts are at most
// that stale). rows/s is the writer's achieved rate: below 20,000 if the
// writer itself fell behind its ticks. Use -benchtime 2400x (two minutes,
// two bucket boundaries at least).
func BenchmarkStream(b *testing.B) {
	admin := benchServer(b)
	// Minute 0 of the warm-up history is kioskWarmDays minutes ago: the
	// stream writes into the minute after it.
	start := time.Now().UTC().Truncate(time.Minute)
	k := newKiosksEvery(b, admin, streamSeries, start.Add(-kioskWarmDays*time.Minute), time.Minute)
	ctx := context.Background()
	var rebuilds atomic.Int64
	counter := newDrainCounter()
	startBenchRunner(b, k.dbURL, func(bi BatchInfo) {
		rebuilds.Add(int64(bi.Rebuilds))
		counter.onBatch(bi)
	})
	report := statementProfile(b, k.pool)

	// The sampler: age of the oldest waiting change and the log's length.
	var ages []float64
	var longest int64
	sampled := make(chan struct{})
	stop := make(chan struct{})
	go func() {
		defer close(sampled)
		t := time.NewTicker(streamSample)
		defer t.Stop()
		for {
			select {
			case <-stop:
				return
			case <-t.C:
			}
			// By the id index: a scan of the log would cost more the
			// longer the log grows. n counts the ids from the head on.
			var n int64
			var age float64
			if err := k.pool.QueryRow(ctx, `
				SELECT coalesce((SELECT max(id) FROM sidetrend.changes) - h.id + 1, 0),
				       coalesce(extract(epoch FROM clock_timestamp() - h.at), 0)::float8
				FROM (SELECT NULL) x LEFT JOIN LATERAL (SELECT id, at FROM sidetrend.changes ORDER BY id LIMIT 1) h ON true`).Scan(&n, &age); err != nil {
				b.Error(err)
				return
			}
			ages = append(ages, age*1e3)
			longest = max(longest, n)
		}
	}()

	sql := valuesSQL("kiosk_takings", kioskCols, streamRows)
	tick := time.NewTicker(streamTick)
	defer tick.Stop()
	commits := 0
	b.ReportAllocs()
	for b.Loop() {
		<-tick.C
		at := time.Now()
		lo := (commits * streamRows) % streamSeries
		rows := k.rows(int(at.Sub(k.origin)/k.step), lo, lo+streamRows, at)
		if _, err := k.pool.Exec(ctx, sql, flatten(rows)...); err != nil {
			b.Fatal(err)
		}
		commits++
	}
	tick.Stop()
	elapsed := b.Elapsed()
	counter.waitFor(b, int64(commits*streamRows))
	close(stop)
	<-sampled
	report()

	slices.Sort(ages)
	if len(ages) > 0 {
		b.ReportMetric(percentile(ages, 0.50), "lag-p50-ms")
		b.ReportMetric(percentile(ages, 0.99), "lag-p99-ms")
		b.ReportMetric(ages[len(ages)-1], "lag-max-ms")
	}
	b.ReportMetric(float64(longest), "log-max")
	b.ReportMetric(float64(commits*streamRows)/elapsed.Seconds(), "rows/s")
	var folds int64
	if err := k.pool.QueryRow(ctx, `SELECT sum(points) - $1 FROM sidetrend.series`, int64(kioskWarmDays*streamSeries)).Scan(&folds); err != nil {
		b.Fatal(err)
	}
	b.ReportMetric(float64(folds), "folds")
	b.ReportMetric(float64(rebuilds.Load()), "rebuilds")
	k.check(b, -1)
}

// --- Latency -----------------------------------------------------------

// latencySeries rows per commit, one commit every latencyTick: the brief's
// steady 1,000 rows/s as 10 rows every 10 ms.
const (
	latencySeries = 10
	latencyTick   = 10 * time.Millisecond
	latencyWarm   = 48 // hours of history before the timer starts: ready states (p = 6)
)

// BenchmarkLatency measures commit-to-forecast latency at a steady rate.
// A writer commits latencySeries rows every latencyTick, one row per meter
// for the next hourly bucket; the hours are long past, so every bucket is
// closed on arrival and the batch that claims a row also folds it and
// writes the new forecast (with current times and a short bucket, the wait
// for the bucket to close would dominate, and that is a property of the
// bucket width, not of the sidecar). An in-process Runner, woken by NOTIFY,
// does the work. Its OnBatch hook, called right after each batch commits,
// records the time and the running count of drained change rows; with one
// writer and one sidecar the change log is drained in commit order, and
// every commit adds exactly latencySeries change rows, so commit k is
// visible in the forecasts once the count reaches k*latencySeries. The
// latency of a commit is from the moment its INSERT returned to that
// batch's commit: an upper bound on when a reader could see it.
//
// One op is one commit, so ns/op is the pacing (about 10 ms) unless the
// writer falls behind. Use -benchtime 3000x or more for a stable p99.
func BenchmarkLatency(b *testing.B) {
	admin := benchServer(b)
	b.Run("rate=1000", func(b *testing.B) {
		pool, dbURL := newBenchDB(b, admin)
		ctx := context.Background()
		benchExec(b, pool, `CREATE TABLE meter_readings (id bigserial PRIMARY KEY, meter text NOT NULL, read_at timestamptz NOT NULL, kwh float8 NOT NULL)`)
		cols := []string{"meter", "read_at", "kwh"}
		origin := time.Date(2001, 1, 1, 0, 0, 0, 0, time.UTC)
		rng := rand.New(rand.NewPCG(1, 1))
		hour := func(h int) [][]any {
			out := make([][]any, latencySeries)
			for m := range out {
				v := 5 + float64(m) + 2*math.Sin(2*math.Pi*float64(h)/24) + 0.5*rng.NormFloat64()
				out[m] = []any{fmt.Sprintf("meter %02d", m), origin.Add(time.Duration(h)*time.Hour + time.Duration(rng.IntN(3600))*time.Second), v}
			}
			return out
		}
		var warm [][]any
		for h := 0; h < latencyWarm; h++ {
			warm = append(warm, hour(h)...)
		}
		if _, err := pool.CopyFrom(ctx, pgx.Identifier{"meter_readings"}, cols, pgx.CopyFromRows(warm)); err != nil {
			b.Fatal(err)
		}
		benchExec(b, pool, `SELECT sidetrend.track('meter_readings', 'read_at', 'kwh', '{meter}', bucket => '1 hour', period => 24, harmonics => 2, horizon => 24, span => '10000 years')`)

		type drained struct {
			at      time.Time
			changes int64
		}
		var mu sync.Mutex
		var batches []drained
		var total int64
		counter := newDrainCounter()
		startBenchRunner(b, dbURL, func(bi BatchInfo) {
			now := time.Now()
			if bi.Changes > 0 {
				mu.Lock()
				total += int64(bi.Changes)
				batches = append(batches, drained{now, total})
				mu.Unlock()
			}
			counter.onBatch(bi)
		})
		report := statementProfile(b, pool)

		sql := valuesSQL("meter_readings", cols, latencySeries)
		var commits []time.Time
		h := latencyWarm
		tick := time.NewTicker(latencyTick)
		defer tick.Stop()
		b.ReportAllocs()
		for b.Loop() {
			<-tick.C
			if _, err := pool.Exec(ctx, sql, flatten(hour(h))...); err != nil {
				b.Fatal(err)
			}
			commits = append(commits, time.Now())
			h++
		}
		tick.Stop()
		elapsed := b.Elapsed()
		counter.waitFor(b, int64(len(commits)*latencySeries))
		report()

		mu.Lock()
		defer mu.Unlock()
		lat := make([]float64, len(commits))
		j := 0
		for k, at := range commits {
			for batches[j].changes < int64(k+1)*latencySeries {
				j++
			}
			lat[k] = max(0, batches[j].at.Sub(at).Seconds()*1e3)
		}
		slices.Sort(lat)
		b.ReportMetric(percentile(lat, 0.50), "p50-ms")
		b.ReportMetric(percentile(lat, 0.99), "p99-ms")
		b.ReportMetric(lat[len(lat)-1], "max-ms")
		b.ReportMetric(float64(len(commits)*latencySeries)/elapsed.Seconds(), "rows/s")

		// The forecasts view shows the last hour written for every meter.
		var asOf time.Time
		var meters int
		if err := pool.QueryRow(ctx, `SELECT min(as_of), count(DISTINCT series_key) FROM sidetrend.forecasts`).Scan(&asOf, &meters); err != nil {
			b.Fatal(err)
		}
		if want := origin.Add(time.Duration(h-1) * time.Hour); meters != latencySeries || !asOf.Equal(want) {
			b.Fatalf("forecasts view: %d meters as of %v; want %d as of %v", meters, asOf, latencySeries, want)
		}
	})
}

// percentile is the nearest-rank percentile of sorted xs: the smallest
// value with at least a fraction p of xs at or below it.
func percentile(sorted []float64, p float64) float64 {
	k := int(math.Ceil(p*float64(len(sorted)))) - 1
	return sorted[min(max(k, 0), len(sorted)-1)]
}
