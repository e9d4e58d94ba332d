package main

import (
	"context"
	"errors"
	"fmt"
	"net"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/pgsync"
	"github.com/sidetrend/sidetrend/sqlwire"
)

// storedDigest is a digest of everything sidetrend stores for its trackers
// except the rejects (which a bad source row adds to by design): trackers,
// series (states, forecasts, errors), points, pending changes and the
// forecast history.
func storedDigest(t *testing.T, ctx context.Context, pool *pgxpool.Pool) string {
	t.Helper()
	var out string
	if err := pool.QueryRow(ctx, `SELECT concat_ws(' | ',
		(SELECT md5(coalesce(string_agg(t::text, ',' ORDER BY id), '')) FROM sidetrend.trackers t),
		(SELECT md5(coalesce(string_agg(s::text, ',' ORDER BY tracker_id, series_key), '')) FROM sidetrend.series s),
		(SELECT md5(coalesce(string_agg(p::text, ',' ORDER BY tracker_id, series_key, bucket), '')) FROM sidetrend.points p),
		(SELECT count(*) FROM sidetrend.changes),
		(SELECT count(*) FROM sidetrend.forecast_issues))`).Scan(&out); err != nil {
		t.Fatal(err)
	}
	return out
}

// TestBadInputCatalogue is the catalogue of bad input (issue 17): track
// arguments, source rows, CSV files, CLI flags and queries to the live
// endpoint. Each case must get a clear error that says what to change (or,
// for a source row, a reject row with its reason), and nothing stored may
// change: not the trackers, series, points, change log nor history, also
// after the sidecar has caught up.
func TestBadInputCatalogue(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	if _, err := pool.Exec(ctx, `CREATE TABLE public.notes (at timestamptz, body text, n float8)`); err != nil {
		t.Fatal(err)
	}
	const password = "lantern-and-kite" // made up for the test
	srv := sqlwire.New(sqlwire.Config{Listen: "127.0.0.1:0", Credentials: map[string]string{"sidetrend": password}},
		liveSource{pool: pool}, pool, nil)
	if err := srv.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer srv.Stop()
	cfg, err := pgx.ParseConfig(fmt.Sprintf("postgres://sidetrend:%s@127.0.0.1:%d/sidetrend?sslmode=disable",
		password, srv.Addr().(*net.TCPAddr).Port))
	if err != nil {
		t.Fatal(err)
	}
	cfg.DefaultQueryExecMode = pgx.QueryExecModeSimpleProtocol
	live, err := pgx.ConnectConfig(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer live.Close(context.Background())

	// track calls sidetrend.track with args, which end with its ")".
	track := func(args string) func() error {
		return func() error {
			_, err := pool.Exec(ctx, `SELECT sidetrend.track(`+args)
			return err
		}
	}
	sourceRow := func(values string) func() error {
		return func() error {
			_, err := pool.Exec(ctx, `INSERT INTO public.sales (shop, sold_at, amount) VALUES `+values)
			return err
		}
	}
	cli := func(args ...string) func() error {
		return func() error {
			_, err := runCLI(t, ctx, args...)
			return err
		}
	}
	csvFile := func(body string, args ...string) func() error {
		return func() error {
			path := writeFile(t, "in.csv", body)
			_, _, err := runForecast(t, append([]string{"--csv", path}, args...)...)
			return err
		}
	}
	query := func(sql string) func() error {
		return func() error {
			rows, err := live.Query(ctx, sql)
			if err != nil {
				return err
			}
			rows.Close()
			return rows.Err()
		}
	}
	const good = "time,value\n2026-01-01,1\n2026-01-02,2\n2026-01-03,3\n"
	cases := []struct {
		kind, name string
		run        func() error
		want       []string // in the error, or in the reject's reason for source rows
	}{
		// Track arguments (sidetrend.track). Each message says what to use.
		{"track", "NaN period", track(`'public.sales', 'sold_at', 'amount', period => 'NaN', harmonics => 1, name => 'x')`), []string{"period NaN is not a number of buckets", "such as 7"}},
		{"track", "infinite period", track(`'public.sales', 'sold_at', 'amount', period => 'Infinity', harmonics => 1, name => 'x')`), []string{"period Infinity", "seasonal period in buckets"}},
		{"track", "period of 1", track(`'public.sales', 'sold_at', 'amount', period => 1, harmonics => 1, name => 'x')`), []string{"too short", "at least 2 buckets"}},
		{"track", "harmonics without period", track(`'public.sales', 'sold_at', 'amount', harmonics => 2, name => 'x')`), []string{"need a period", "period =>"}},
		{"track", "too many harmonics", track(`'public.sales', 'sold_at', 'amount', period => 7, harmonics => 4, name => 'x')`), []string{"harmonics are too many for period 7", "at most 3"}},
		{"track", "degree 7", track(`'public.sales', 'sold_at', 'amount', degree => 7, name => 'x')`), []string{"degree 7 is not supported", "from 0 to 3"}},
		{"track", "lambda 0", track(`'public.sales', 'sold_at', 'amount', lambda => 0, name => 'x')`), []string{"outside (0, 1]", "such as 0.95"}},
		{"track", "lambda NaN", track(`'public.sales', 'sold_at', 'amount', lambda => 'NaN', name => 'x')`), []string{"lambda NaN is outside (0, 1]"}},
		{"track", "lambda 1.5", track(`'public.sales', 'sold_at', 'amount', lambda => 1.5, name => 'x')`), []string{"lambda 1.5 is outside (0, 1]"}},
		{"track", "horizon 0", track(`'public.sales', 'sold_at', 'amount', horizon => 0, name => 'x')`), []string{"horizon 0 is out of range", "1 to 1000"}},
		{"track", "horizon 5000", track(`'public.sales', 'sold_at', 'amount', horizon => 5000, name => 'x')`), []string{"horizon 5000", "live endpoint"}},
		{"track", "negative burn-in", track(`'public.sales', 'sold_at', 'amount', burn_in => -1, name => 'x')`), []string{"burn_in -1 is out of range", "0 to 100000"}},
		{"track", "empty name", track(`'public.sales', 'sold_at', 'amount', name => '')`), []string{"tracker name is empty", "name =>"}},
		{"track", "NULL table", track(`NULL, 'sold_at', 'amount', name => 'x')`), []string{"the table to track is missing", "source =>"}},
		{"track", "no such table", track(`'public.nope', 'sold_at', 'amount', name => 'x')`), []string{`"public.nope" does not exist`}},
		{"track", "no such time column", track(`'public.sales', 'when', 'amount', name => 'x')`), []string{`"when"`}},
		{"track", "text value column", track(`'public.notes', 'at', 'body', name => 'x')`), []string{`"body"`}},
		{"track", "bucket of 200 years", track(`'public.sales', 'sold_at', 'amount', bucket => '200 years', name => 'x')`), []string{"longer than 100 years", "'1 year'"}},
		{"track", "zero bucket", track(`'public.sales', 'sold_at', 'amount', bucket => '0 days', name => 'x')`), []string{"bucket"}},
		{"track", "unknown aggregate", track(`'public.sales', 'sold_at', 'amount', agg => 'median', name => 'x')`), []string{`unknown aggregate "median"`, "sum, mean"}},
		{"track", "unknown empty", track(`'public.sales', 'sold_at', 'amount', empty => 'skip', name => 'x')`), []string{`empty => "skip" is not known`, "'zero'"}},
		{"track", "unknown zone", track(`'public.sales', 'sold_at', 'amount', tz => 'Mars/Olympus', name => 'x')`), []string{"Mars/Olympus"}},
		{"track", "span below a bucket", track(`'public.sales', 'sold_at', 'amount', span => '1 hour', name => 'x')`), []string{"span '01:00:00' is out of range", "at least one bucket"}},
		{"track", "name taken", track(`'public.sales', 'sold_at', 'amount', name => 'sales')`), []string{`a tracker named "sales" already exists`, "untrack"}},

		// Source rows: each lands in sidetrend.rejects with its reason.
		{"row", "NULL value", sourceRow(`('north', '2025-05-20', NULL)`), []string{"value is NULL"}},
		{"row", "NaN value", sourceRow(`('north', '2025-05-20', 'NaN')`), []string{"value is NaN"}},
		{"row", "infinite value", sourceRow(`('north', '2025-05-20', 'Infinity')`), []string{"value is infinite"}},
		{"row", "huge value", sourceRow(`('north', '2025-05-20', 1e300)`), []string{"value is beyond +-1e150"}},
		{"row", "NULL time", sourceRow(`('north', NULL, 5)`), []string{"time is NULL"}},
		{"row", "infinite time", sourceRow(`('north', 'infinity', 5)`), []string{"time is infinite"}},
		{"row", "time beyond the span", sourceRow(`('north', '1200-01-01', 5)`), []string{"time is more than"}},
		{"row", "over-long key", sourceRow(`(repeat('k', 1001), '2025-05-20', 5)`), []string{"series key is longer than 1000 bytes"}},

		// CSV files for the offline forecast.
		{"csv", "no time column", csvFile("when,value\n2026-01-01,1\n"), []string{`no column "time"`, "--time-col"}},
		{"csv", "no value column", csvFile("time,amount\n2026-01-01,1\n"), []string{`no column "value"`, "--value-col"}},
		{"csv", "bad time", csvFile("time,value\n2026-01-01,1\n2026-13-01,2\n"), []string{"line 3", "RFC 3339", "as Postgres writes it"}},
		{"csv", "decimal comma", csvFile("time,value\n2026-01-01,1\n2026-01-02,\"1,5\"\n"), []string{"line 3", "a dot for decimals"}},
		{"csv", "NaN value", csvFile("time,value\n2026-01-01,NaN\n"), []string{"line 2", "not a finite number"}},
		{"csv", "empty file", csvFile(""), []string{"is empty", "header row"}},
		{"csv", "header only", csvFile("time,value\n"), []string{"no rows"}},
		{"csv", "short row", csvFile("time,value\n2026-01-01\n"), []string{"line 2", "has 1 fields"}},

		// CLI flags.
		{"flag", "track --degree 7 passes the hint on", cli("track", "--db", url, "--table", "public.sales", "--time", "sold_at", "--value", "amount", "--degree", "7", "--name", "x"),
			[]string{"degree 7 is not supported", "HINT: Use a polynomial degree from 0 to 3"}},
		{"flag", "track --lambda high", cli("track", "--db", url, "--table", "public.sales", "--time", "sold_at", "--value", "amount", "--lambda", "high"), []string{`--lambda "high" is not a number`}},
		{"flag", "forecast --bucket fortnight", csvFile(good, "--bucket", "1 fortnight"), []string{"--bucket"}},
		{"flag", "forecast --horizon 0", csvFile(good, "--horizon", "0"), []string{"--horizon 0 is out of range"}},
		{"flag", "forecast --harmonics without --period", csvFile(good, "--harmonics", "2"), []string{"--harmonics 2 needs --period"}},
		{"flag", "status --format yaml", cli("status", "--db", url, "--format", "yaml"), []string{"use table or json"}},
		{"flag", "status --limit 0", cli("status", "--db", url, "--limit", "0"), []string{"--limit 0", "1 or more"}},
		{"flag", "rebuild --series without --tracker", cli("rebuild", "--db", url, "--series", "north"), []string{"--series needs --tracker"}},
		{"flag", "untrack without a name", cli("untrack", "--db", url), []string{"sidetrend untrack NAME"}},
		{"flag", "untrack an unknown tracker", cli("untrack", "--db", url, "nope"), []string{`no tracker named "nope"`, "HINT:"}},

		// Queries to the live endpoint.
		{"query", "forecast without a horizon bound", query(`SELECT forecast FROM sidetrend_live.forecast WHERE tracker = 'sales'`), []string{"WHERE horizon <= 30"}},
		{"query", "a write", query(`DELETE FROM sidetrend_live.series`), []string{"25006"}},
		{"query", "an unknown table", query(`SELECT * FROM sidetrend_live.budget`), []string{"budget"}},
		{"query", "a function", query(`SELECT pg_sleep(10) FROM sidetrend_live.series`), []string{"pg_sleep"}},
		{"query", "not SQL", query(`SELEKT 1`), []string{"SELEKT"}},
	}
	before := storedDigest(t, ctx, pool)
	var rejectsBefore int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.rejects`).Scan(&rejectsBefore); err != nil {
		t.Fatal(err)
	}
	kinds := map[string]int{}
	for _, c := range cases {
		kinds[c.kind]++
		err := c.run()
		got := ""
		if c.kind == "row" {
			if err != nil {
				t.Errorf("%s: the INSERT failed (%v); a bad row must be set aside, not fail the writer", c.name, err)
				continue
			}
			if err := pool.QueryRow(ctx, `SELECT reason FROM sidetrend.rejects ORDER BY id DESC LIMIT 1`).Scan(&got); err != nil {
				t.Fatalf("%s: %v", c.name, err)
			}
			rejectsBefore++
		} else {
			if err == nil {
				t.Errorf("%s %s: no error", c.kind, c.name)
				continue
			}
			got = err.Error()
			var pg *pgconn.PgError
			if errors.As(err, &pg) {
				got += " " + pg.Code + " " + pg.Detail + " HINT: " + pg.Hint
			}
		}
		if testing.Verbose() {
			t.Logf("%s %s: %s", c.kind, c.name, oneLine(got))
		}
		for _, w := range c.want {
			if !strings.Contains(got, w) {
				t.Errorf("%s %s: %q does not say %q", c.kind, c.name, got, w)
			}
		}
		if after := storedDigest(t, ctx, pool); after != before {
			t.Fatalf("%s %s changed what is stored:\nbefore %s\nafter  %s", c.kind, c.name, before, after)
		}
	}
	// The sidecar drains whatever the cases left: still nothing changes.
	if err := pgsync.NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if after := storedDigest(t, ctx, pool); after != before {
		t.Errorf("after a catch-up, what is stored changed:\nbefore %s\nafter  %s", before, after)
	}
	var rejects int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.rejects`).Scan(&rejects); err != nil || rejects != rejectsBefore {
		t.Errorf("%d rejects, want %d (err %v)", rejects, rejectsBefore, err)
	}
	t.Logf("%d cases: %v", len(cases), kinds)
	if len(cases) < 40 {
		t.Errorf("the catalogue has %d cases, want at least 40", len(cases))
	}
}
