package pgsync

import (
	"context"
	"fmt"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/internal/pgtest"
)

// The security tests run the findings of a review with real roles, none a
// superuser: the sidecar's role (it owns schema sidetrend and may not create
// roles), a writer who tracks tables and tries to run code as the sidecar, a
// second writer, an administrator, a reader, and a clerk with INSERT only.

// secEnv is one database set up with those roles.
type secEnv struct {
	dbURL   string
	roles   map[string]string
	admin   *pgx.Conn     // the test server's superuser, to set the scene
	sidecar *pgxpool.Pool // the sidecar's role
}

func (e *secEnv) id(short string) string { return pgx.Identifier{e.roles[short]}.Sanitize() }

func (e *secEnv) conn(t *testing.T, short string) *pgx.Conn {
	return connectURL(t, asRole(t, e.dbURL, e.roles[short]))
}

func (e *secEnv) must(t *testing.T, c *pgx.Conn, sqls ...string) {
	t.Helper()
	for _, sql := range sqls {
		if _, err := c.Exec(context.Background(), sql); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
	}
}

func newSecEnv(t *testing.T) *secEnv {
	t.Helper()
	ensureSharedRoles(t)
	roles := testRoles(t, map[string]string{"side": "NOSUPERUSER NOCREATEROLE", "mallory": "", "wendy": "",
		"ada": "", "rita": "", "clerk": ""})
	dbURL := pgtest.NewDatabase(t)
	ctx := context.Background()
	e := &secEnv{dbURL: dbURL, roles: roles, admin: connectURL(t, dbURL)}
	dbName := strings.TrimPrefix(must(url.Parse(dbURL)).Path, "/")
	e.must(t, e.admin,
		fmt.Sprintf(`GRANT CREATE ON DATABASE %s TO %s, %s, %s`, pgx.Identifier{dbName}.Sanitize(), e.id("side"), e.id("mallory"), e.id("wendy")),
		`GRANT sidetrend_writer TO `+e.id("mallory")+`, `+e.id("wendy")+`, `+e.id("ada"),
		`GRANT sidetrend_admin TO `+e.id("ada"),
		`GRANT sidetrend_reader TO `+e.id("rita"),
	)
	sideURL := asRole(t, dbURL, roles["side"])
	if _, err := Migrate(ctx, sideURL, nil); err != nil {
		t.Fatalf("migrate as the sidecar's role: %v", err)
	}
	pool, err := Connect(ctx, sideURL)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	e.sidecar = pool
	return e
}

// pwned counts the calls of the attacker's functions: each inserts a row
// into public.pwned (writable by everyone) saying as whom it ran.
func (e *secEnv) pwned(t *testing.T) []string {
	t.Helper()
	rows, err := e.admin.Query(context.Background(), `SELECT who FROM public.pwned ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	who, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	return who
}

func (e *secEnv) setUpPwn(t *testing.T, schema string) {
	t.Helper()
	e.must(t, e.admin,
		`CREATE TABLE IF NOT EXISTS public.pwned (who text)`,
		`GRANT INSERT, SELECT ON public.pwned TO PUBLIC`)
	m := e.conn(t, "mallory")
	e.must(t, m,
		fmt.Sprintf(`CREATE SCHEMA %s`, schema),
		fmt.Sprintf(`CREATE FUNCTION %s.pwn() RETURNS int LANGUAGE plpgsql AS $$ BEGIN INSERT INTO public.pwned VALUES (current_user); RETURN 1; END $$`, schema),
		fmt.Sprintf(`GRANT USAGE ON SCHEMA %s TO PUBLIC`, schema),
		fmt.Sprintf(`GRANT EXECUTE ON FUNCTION %s.pwn() TO PUBLIC`, schema))
}

// TestNamesNeverRun puts dollar quotes, quotes, semicolons, comment marks
// and format directives in every place a name goes (schema, table, time,
// value and key columns, tracker name) and drives the tracker through
// capture, backfill, drain, recompute, update, delete and truncate: the
// attacker's function must never run, and the forecasts must be right.
func TestNamesNeverRun(t *testing.T) {
	t.Parallel()
	e := newSecEnv(t)
	ctx := context.Background()
	e.setUpPwn(t, "w")
	payload := func(s string) string { return s + `$body$;SELECT w.pwn();SELECT $body$` }
	// Each name closes every dollar quote the code has used, ends a
	// literal and an identifier, comments out the rest, and holds format
	// directives.
	schema := payload(`s$f$;$fn$;$tpl$;$$;'";--%s%1$L`)
	table := payload(`t$q$'';"";--%I`)
	cols := map[string]string{
		"time":  payload(`at$r$'`),
		"value": payload(`v";SELECT w.pwn();--`),
		"key":   payload(`k%1$s%L'$$`),
		"key2":  payload(`"k2;`),
	}
	q := func(s string) string { return pgx.Identifier{s}.Sanitize() }
	rel := q(schema) + "." + q(table)
	m := e.conn(t, "mallory")
	e.must(t, m,
		`CREATE SCHEMA `+q(schema),
		fmt.Sprintf(`CREATE TABLE %s (id serial, %s timestamptz, %s numeric, %s text, %s int)`, rel,
			q(cols["time"]), q(cols["value"]), q(cols["key"]), q(cols["key2"])),
		fmt.Sprintf(`GRANT USAGE ON SCHEMA %s TO %s`, q(schema), e.id("side")),
		fmt.Sprintf(`GRANT SELECT, TRIGGER ON %s TO %s`, rel, e.id("side")),
		`SET check_function_bodies = off`)
	name := payload(`n'";%s`)
	var tid int
	if err := m.QueryRow(ctx, `SELECT sidetrend.track($1::regclass, $2, $3, ARRAY[$4, $5], agg => 'max', degree => 0, horizon => 2, name => $6)`,
		rel, cols["time"], cols["value"], cols["key"], cols["key2"], name).Scan(&tid); err != nil {
		t.Fatalf("track the table with hostile names: %v", err)
	}
	ins := fmt.Sprintf(`INSERT INTO %s (%s, %s, %s, %s) VALUES ($1, $2, $3, $4)`, rel, q(cols["time"]), q(cols["value"]), q(cols["key"]), q(cols["key2"]))
	day := func(d int) time.Time { return time.Now().UTC().Truncate(24*time.Hour).AddDate(0, 0, d-10) }
	for d := 0; d < 6; d++ {
		if _, err := m.Exec(ctx, ins, day(d), 10+d, "a$body$", 1); err != nil {
			t.Fatal(err)
		}
	}
	syncer := NewSyncer(e.sidecar, nil)
	syncer.DrainAll = true
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	for d := 6; d < 9; d++ {
		if _, err := m.Exec(ctx, ins, day(d), 10+d, "a$body$", 1); err != nil {
			t.Fatal(err)
		}
	}
	// A delete makes the max of its bucket recomputed from the table, an
	// update moves a row, a single-series rebuild reads the table again.
	e.must(t, m,
		fmt.Sprintf(`DELETE FROM %s WHERE %s = 18`, rel, q(cols["value"])),
		fmt.Sprintf(`UPDATE %s SET %s = 40 WHERE %s = 17`, rel, q(cols["value"]), q(cols["value"])))
	if _, err := m.Exec(ctx, `SELECT sidetrend.rebuild($1, $2)`, name, "a$body$|1"); err != nil {
		t.Fatalf("rebuild one series: %v", err)
	}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var values []float64
	rows, err := e.sidecar.Query(ctx, `SELECT value FROM sidetrend.actuals WHERE tracker = $1 ORDER BY bucket`, name)
	if err != nil {
		t.Fatal(err)
	}
	if values, err = pgx.CollectRows(rows, pgx.RowTo[float64]); err != nil {
		t.Fatal(err)
	}
	// Days 0..8 held 10..18; 18 was deleted, 17 became 40.
	want := []float64{10, 11, 12, 13, 14, 15, 16, 40}
	if fmt.Sprint(values) != fmt.Sprint(want) {
		t.Errorf("bucket values %v, want %v", values, want)
	}
	e.must(t, m, `TRUNCATE `+rel)
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if _, err := m.Exec(ctx, `SELECT sidetrend.untrack($1)`, name); err != nil {
		t.Fatalf("untrack: %v", err)
	}
	if who := e.pwned(t); len(who) > 0 {
		t.Fatalf("the attacker's function ran %d times, as %v", len(who), who)
	}
}

// TestOwnerCodeNeverRuns: a table owner changes a tracked column to a type
// of its own with a cast of its own, and enables row-level security with a
// policy of its own. The sidecar must never call them: capture stops, the
// tracker pauses with the reason, and it resumes (with a backfill that
// takes in the rows written meanwhile) once the table is plain again.
func TestOwnerCodeNeverRuns(t *testing.T) {
	t.Parallel()
	e := newSecEnv(t)
	ctx := context.Background()
	e.setUpPwn(t, "w")
	m := e.conn(t, "mallory")
	e.must(t, m,
		`CREATE TABLE w.t (at timestamptz, v numeric, k text)`,
		`GRANT SELECT, TRIGGER ON w.t TO `+e.id("side"),
		`CREATE TABLE w.other (at timestamptz, v numeric)`,
		`GRANT SELECT, TRIGGER ON w.other TO `+e.id("side"),
		`SELECT sidetrend.track('w.t', 'at', 'v', '{k}', degree => 0, horizon => 2)`,
		`SELECT sidetrend.track('w.other', 'at', 'v', degree => 0, horizon => 2)`)
	day := func(d int) time.Time { return time.Now().UTC().Truncate(24*time.Hour).AddDate(0, 0, d-10) }
	insert := func(table string, d int, v float64) {
		t.Helper()
		sql := `INSERT INTO w.t (at, v, k) VALUES ($1, $2, 'a')`
		if table == "other" {
			sql = `INSERT INTO w.other (at, v) VALUES ($1, $2)`
		}
		if _, err := m.Exec(ctx, sql, day(d), v); err != nil {
			t.Fatal(err)
		}
	}
	syncer := NewSyncer(e.sidecar, nil)
	syncer.DrainAll = true
	for d := 0; d < 3; d++ {
		insert("t", d, 1)
		insert("other", d, 1)
	}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	status := func(name string) (string, string) {
		t.Helper()
		var st string
		var msg *string
		if err := e.sidecar.QueryRow(ctx, `SELECT status, last_error FROM sidetrend.trackers WHERE name = $1`, name).Scan(&st, &msg); err != nil {
			t.Fatal(err)
		}
		if msg == nil {
			return st, ""
		}
		return st, *msg
	}

	// A key of the owner's own type whose cast to text is the owner's code.
	e.must(t, m,
		`CREATE TYPE w.k2 AS (a text)`,
		`CREATE FUNCTION w.k2_text(w.k2) RETURNS text LANGUAGE plpgsql AS $$ BEGIN PERFORM w.pwn(); RETURN $1.a; END $$`,
		`CREATE CAST (w.k2 AS text) WITH FUNCTION w.k2_text(w.k2) AS IMPLICIT`,
		`ALTER TABLE w.t ALTER COLUMN k TYPE w.k2 USING ROW(k)::w.k2`)
	if _, err := m.Exec(ctx, `INSERT INTO w.t (at, v, k) VALUES ($1, 5, ROW('a'))`, day(3)); err != nil {
		t.Fatalf("the owner's insert after the type change: %v (capture must not fail the owner's writes)", err)
	}
	insert("other", 3, 1)
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if st, msg := status("t"); st != "paused" || !strings.Contains(msg, `has type w.k2, which sidetrend does not read`) {
		t.Errorf("after the type change: status %s (%s), want paused with the reason", st, msg)
	}
	var n int
	if err := e.sidecar.QueryRow(ctx, `SELECT count(*) FROM pg_trigger WHERE tgrelid = 'w.t'::regclass`).Scan(&n); err != nil || n != 0 {
		t.Errorf("%d triggers left on the paused tracker's table (err %v), want 0", n, err)
	}
	if st, _ := status("other"); st != "active" {
		t.Errorf("the other tracker is %s, want active", st)
	}
	// Back to text: the tracker resumes and its backfill takes the row
	// written while it was paused.
	e.must(t, m, `ALTER TABLE w.t ALTER COLUMN k TYPE text USING (k).a`)
	syncer.lastCheck = time.Time{}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if st, msg := status("t"); st != "active" {
		t.Errorf("after the type is text again: status %s (%s), want active", st, msg)
	}
	var sum float64
	if err := e.sidecar.QueryRow(ctx, `SELECT sum(value) FROM sidetrend.actuals WHERE tracker = 't'`).Scan(&sum); err != nil || sum != 8 {
		t.Errorf("bucket values sum to %v (err %v) after the resume, want 1+1+1+5 = 8", sum, err)
	}

	// Row-level security with the owner's function in the policy.
	e.must(t, m,
		`CREATE POLICY p ON w.t USING (w.pwn() = 1)`,
		`ALTER TABLE w.t ENABLE ROW LEVEL SECURITY`)
	// The backfill function itself refuses to read under a policy (run it
	// as the sidecar would, before any check had paused the tracker).
	var tid int
	if err := e.sidecar.QueryRow(ctx, `SELECT id FROM sidetrend.trackers WHERE name = 't'`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	_, err := e.sidecar.Exec(ctx, fmt.Sprintf(`SELECT sidetrend._backfill_%d()`, tid))
	wantSQLState(t, "backfill under a policy", err, "42501", "row-level security")
	syncer.lastCheck = time.Time{}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if st, msg := status("t"); st != "paused" || !strings.Contains(msg, "row-level security") {
		t.Errorf("with row-level security: status %s (%s), want paused", st, msg)
	}
	// track() refuses such a table outright.
	_, err = m.Exec(ctx, `SELECT sidetrend.track('w.t', 'at', 'v', name => 't2')`)
	wantSQLState(t, "track a table with row-level security", err, "42501", "row-level security")
	if who := e.pwned(t); len(who) > 0 {
		t.Fatalf("the owner's code ran %d times, as %v", len(who), who)
	}
}

// TestWriterCannotStopTheLog: rows the sidecar cannot store go to rejects
// at capture, a change that fails for one tracker sets that tracker aside
// and the others drain, and settings that could not be served are refused.
func TestWriterCannotStopTheLog(t *testing.T) {
	t.Parallel()
	e := newSecEnv(t)
	ctx := context.Background()
	w := e.conn(t, "wendy")
	e.must(t, e.admin,
		`CREATE TABLE public.meter (at timestamptz, v float8, k text)`,
		`CREATE TABLE public.kiosk (at timestamptz, v float8)`,
		`GRANT SELECT, TRIGGER ON public.meter, public.kiosk TO `+e.id("side"),
		`GRANT SELECT ON public.meter, public.kiosk TO `+e.id("wendy"),
		`GRANT SELECT, INSERT, DELETE ON public.meter, public.kiosk TO `+e.id("clerk"))
	e.must(t, w,
		`SELECT sidetrend.track('public.meter', 'at', 'v', '{k}', bucket => '1 hour', agg => 'max', degree => 0, horizon => 2)`,
		`SELECT sidetrend.track('public.kiosk', 'at', 'v', degree => 0, horizon => 2)`)
	clerk := e.conn(t, "clerk")
	now := time.Now().UTC()
	for _, row := range []struct {
		at time.Time
		k  string
	}{
		{now, strings.Repeat("x", 3200)},                     // index entries hold about 2700 bytes
		{time.Date(1, 1, 1, 0, 0, 0, 0, time.UTC), "old"},    // 17.76M empty hourly buckets
		{time.Date(1900, 1, 1, 0, 0, 0, 0, time.UTC), "old"}, // beyond 100,000 hours
		{now.Add(-time.Hour), "ok"},
	} {
		if _, err := clerk.Exec(ctx, `INSERT INTO public.meter (at, v, k) VALUES ($1, 1, $2)`, row.at, row.k); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := clerk.Exec(ctx, `INSERT INTO public.kiosk (at, v) VALUES ($1, 3)`, now.Add(-48*time.Hour)); err != nil {
		t.Fatal(err)
	}
	syncer := NewSyncer(e.sidecar, nil)
	syncer.DrainAll = true
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatalf("catch up after hostile rows: %v", err)
	}
	rows, err := e.sidecar.Query(ctx, `SELECT reason, row_data->>'key' FROM sidetrend.rejects ORDER BY id`)
	if err != nil {
		t.Fatal(err)
	}
	type reject struct{ reason, key string }
	got, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (reject, error) {
		var x reject
		return x, r.Scan(&x.reason, &x.key)
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 3 || got[0].reason != "series key is longer than 1000 bytes" || len(got[0].key) != 200 ||
		!strings.HasPrefix(got[1].reason, "time is more than 100000:00:00 from now") || !strings.HasPrefix(got[2].reason, "time is more than") {
		t.Errorf("rejects %v, want the long key (kept as 200 characters) and two times beyond the span", got)
	}
	var series []string
	rows, err = e.sidecar.Query(ctx, `SELECT series_key FROM sidetrend.series ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	if series, err = pgx.CollectRows(rows, pgx.RowTo[string]); err != nil || fmt.Sprint(series) != "[ ok]" {
		t.Errorf("series %q (err %v), want the kiosk's and ok", series, err)
	}

	// A replay that fails for one tracker (its one-bucket recompute, here
	// made to fail by the sidecar's own role, as a broken disk or a bug
	// would) sets that tracker aside; the other tracker's change drains in
	// the same catch-up.
	var meterID int
	if err := e.sidecar.QueryRow(ctx, `SELECT id FROM sidetrend.trackers WHERE name = 'meter'`).Scan(&meterID); err != nil {
		t.Fatal(err)
	}
	if _, err := e.sidecar.Exec(ctx, fmt.Sprintf(`CREATE OR REPLACE FUNCTION sidetrend._recompute_%d(only_key text, only_bucket bigint)
		RETURNS TABLE (n bigint, s float8, mn float8, mx float8, lt timestamptz, lv float8)
		LANGUAGE plpgsql AS $$ BEGIN RAISE EXCEPTION 'the recompute fails'; END $$`, meterID)); err != nil {
		t.Fatal(err)
	}
	if _, err := clerk.Exec(ctx, `INSERT INTO public.meter (at, v, k) VALUES ($1, 2, 'ok')`, now.Add(-time.Hour)); err != nil {
		t.Fatal(err)
	}
	if _, err := clerk.Exec(ctx, `DELETE FROM public.meter WHERE v = 2`); err != nil {
		t.Fatal(err)
	}
	if _, err := clerk.Exec(ctx, `INSERT INTO public.kiosk (at, v) VALUES ($1, 4)`, now.Add(-24*time.Hour)); err != nil {
		t.Fatal(err)
	}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatalf("catch up with a change that fails: %v", err)
	}
	var st, msg string
	if err := e.sidecar.QueryRow(ctx, `SELECT status, coalesce(last_error, '') FROM sidetrend.trackers WHERE name = 'meter'`).Scan(&st, &msg); err != nil {
		t.Fatal(err)
	}
	if st != "broken" || !strings.Contains(msg, "the recompute fails") || !strings.Contains(msg, "sidetrend.rebuild('meter')") {
		t.Errorf("meter: status %s (%s), want broken with how to resume", st, msg)
	}
	var kiosk float64
	if err := e.sidecar.QueryRow(ctx, `SELECT sum(value) FROM sidetrend.actuals WHERE tracker = 'kiosk'`).Scan(&kiosk); err != nil || kiosk != 7 {
		t.Errorf("kiosk values sum to %v (err %v), want 3 + 4", kiosk, err)
	}
	var left int
	if err := e.sidecar.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&left); err != nil || left != 0 {
		t.Errorf("%d changes left in the log (err %v), want 0", left, err)
	}
	// Its owner resumes it: a full backfill from the table.
	if _, err := w.Exec(ctx, `SELECT sidetrend.rebuild('meter')`); err != nil {
		t.Fatalf("resume with rebuild: %v", err)
	}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	if err := e.sidecar.QueryRow(ctx, `SELECT status FROM sidetrend.trackers WHERE name = 'meter'`).Scan(&st); err != nil || st != "active" {
		t.Errorf("meter after rebuild: %s (err %v), want active", st, err)
	}

	// The sidecar's role loses SELECT on a max tracker's table and a row is
	// deleted (its bucket would be recomputed from the table): the tracker
	// pauses, the other goes on, and it resumes when the grant is back.
	e.must(t, e.admin, `REVOKE SELECT ON public.meter FROM `+e.id("side"))
	if _, err := clerk.Exec(ctx, `DELETE FROM public.meter WHERE k = 'ok'`); err != nil {
		t.Fatal(err)
	}
	if _, err := clerk.Exec(ctx, `INSERT INTO public.kiosk (at, v) VALUES ($1, 5)`, now.Add(-24*time.Hour)); err != nil {
		t.Fatal(err)
	}
	syncer.lastCheck = time.Time{}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatalf("catch up after the revoke: %v", err)
	}
	if err := e.sidecar.QueryRow(ctx, `SELECT status, coalesce(last_error, '') FROM sidetrend.trackers WHERE name = 'meter'`).Scan(&st, &msg); err != nil {
		t.Fatal(err)
	}
	if st != "paused" || !strings.Contains(msg, "may not read public.meter") {
		t.Errorf("meter after the revoke: %s (%s), want paused", st, msg)
	}
	if err := e.sidecar.QueryRow(ctx, `SELECT sum(value) FROM sidetrend.actuals WHERE tracker = 'kiosk'`).Scan(&kiosk); err != nil || kiosk != 12 {
		t.Errorf("kiosk values sum to %v (err %v), want 3 + 4 + 5", kiosk, err)
	}
	e.must(t, e.admin, `GRANT SELECT ON public.meter TO `+e.id("side"))
	syncer.lastCheck = time.Time{}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var meterRows int
	if err := e.sidecar.QueryRow(ctx, `SELECT status FROM sidetrend.trackers WHERE name = 'meter'`).Scan(&st); err != nil || st != "active" {
		t.Errorf("meter after the grant: %s (err %v), want active", st, err)
	}
	if err := e.sidecar.QueryRow(ctx, `SELECT count(*) FROM sidetrend.actuals WHERE tracker = 'meter'`).Scan(&meterRows); err != nil || meterRows != 0 {
		t.Errorf("meter holds %d buckets after the resume (err %v), want 0: its one good row was deleted", meterRows, err)
	}

	// Settings that would stop the sidecar are refused with what to change.
	for _, c := range []struct{ sql, state, msg string }{
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', period => 'NaN', harmonics => 1, name => 'x')`, "22023", "period NaN is not a number of buckets"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', period => 'Infinity', harmonics => 1, name => 'x')`, "22023", "period Infinity is not a number of buckets"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', bucket => '300000 years', name => 'x')`, "22023", "longer than 100 years"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', name => '')`, "22023", "tracker name is empty"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', name => E'a\nb')`, "22023", "control characters"},
		{`SELECT sidetrend.track(NULL, 't', 'v')`, "22004", "the table to track is missing"},
		{`SELECT sidetrend.track('public.kiosk', NULL, 'v', name => 'x')`, "22023", "time_col is missing"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', span => '20000 years', name => 'x')`, "22023", "span"},
		{`SELECT sidetrend.track('public.kiosk', 'at', 'v', lambda => 'NaN', name => 'x')`, "22023", "lambda NaN is outside (0, 1]"},
	} {
		_, err := w.Exec(ctx, c.sql)
		wantSQLState(t, c.sql, err, c.state, c.msg)
	}
}

// TestTrackerAccess: owners, admins, SET ROLE, lost rights, what readers
// see, and a backfill that does not block the table's writers.
func TestTrackerAccess(t *testing.T) {
	t.Parallel()
	e := newSecEnv(t)
	ctx := context.Background()
	e.must(t, e.admin,
		`CREATE TABLE public.sales (at timestamptz, v float8, shop text)`,
		`CREATE TABLE public.payroll (at timestamptz, v float8, person text)`,
		`GRANT SELECT, TRIGGER ON public.sales, public.payroll TO `+e.id("side"),
		`GRANT SELECT ON public.sales TO `+e.id("wendy")+`, `+e.id("mallory")+`, `+e.id("rita")+`, `+e.id("ada"),
		`GRANT SELECT ON public.payroll TO `+e.id("wendy"),
		`GRANT INSERT ON public.sales, public.payroll TO `+e.id("clerk"))
	w, m, ada, rita, clerk := e.conn(t, "wendy"), e.conn(t, "mallory"), e.conn(t, "ada"), e.conn(t, "rita"), e.conn(t, "clerk")
	e.must(t, w,
		`SELECT sidetrend.track('public.sales', 'at', 'v', '{shop}', degree => 0, horizon => 2)`,
		`SELECT sidetrend.track('public.payroll', 'at', 'v', '{person}', degree => 0, horizon => 2)`)
	var owner string
	if err := e.sidecar.QueryRow(ctx, `SELECT owner FROM sidetrend.trackers WHERE name = 'sales'`).Scan(&owner); err != nil || owner != e.roles["wendy"] {
		t.Errorf("owner %q (err %v), want %q", owner, err, e.roles["wendy"])
	}
	// Another writer who may read the table may not change the tracker.
	for _, sql := range []string{`SELECT sidetrend.untrack('sales')`, `SELECT sidetrend.rebuild('sales')`,
		`SELECT sidetrend.request_tune('sales')`, `SELECT * FROM sidetrend.tune('sales')`,
		`SELECT sidetrend.alter_tracker('sales', horizon => 3)`} {
		_, err := m.Exec(ctx, sql)
		wantSQLState(t, "another writer: "+sql, err, "42501", "it belongs to role")
	}
	// Calling the function behind track() with another role's name.
	_, err := m.Exec(ctx, `SELECT sidetrend._untrack_as($1, 'sales')`, e.roles["wendy"])
	wantSQLState(t, "untrack in another role's name", err, "42501", "may not act as role")
	_, err = m.Exec(ctx, `SELECT sidetrend._alter_tracker_as($1, 'sales', 3, NULL, NULL, NULL, NULL, false, NULL, NULL, NULL, NULL, NULL, NULL)`, e.roles["wendy"])
	wantSQLState(t, "alter in another role's name", err, "42501", "may not act as role")
	_, err = m.Exec(ctx, `SELECT sidetrend._track_as($1, 'public.sales', 'at', 'v', '{}', '1 day', 'sum', 1, NULL, 0, 0.95, 12, 'x', NULL, 'UTC', 0, NULL, 'log')`, e.roles["wendy"])
	wantSQLState(t, "track in another role's name", err, "42501", "may not act as role")
	// Its owner may (and a member of sidetrend_admin, below).
	if _, err := w.Exec(ctx, `SELECT sidetrend.alter_tracker('sales', horizon => 3)`); err != nil {
		t.Errorf("the owner alters its tracker: %v", err)
	}
	if _, err := ada.Exec(ctx, `SELECT sidetrend.alter_tracker('sales', horizon => 2)`); err != nil {
		t.Errorf("a member of sidetrend_admin alters a tracker: %v", err)
	}
	// An administrator may.
	if _, err := ada.Exec(ctx, `SELECT sidetrend.request_tune('sales')`); err != nil {
		t.Errorf("a member of sidetrend_admin requests tuning: %v", err)
	}
	// SET ROLE to a role that may not read the table: the check follows it.
	e.must(t, e.admin, `GRANT `+e.id("mallory")+` TO `+e.id("wendy"))
	e.must(t, w, `SET ROLE `+e.id("mallory"))
	_, err = w.Exec(ctx, `SELECT sidetrend.track('public.payroll', 'at', 'v', name => 'payroll2')`)
	wantSQLState(t, "track after SET ROLE to a role without SELECT", err, "42501", "may not read public.payroll")
	e.must(t, w, `RESET ROLE`)

	now := time.Now().UTC()
	for d := 1; d <= 3; d++ {
		for _, tbl := range []string{"sales", "payroll"} {
			if _, err := clerk.Exec(ctx, `INSERT INTO public.`+tbl+` VALUES ($1, $2, 'x')`, now.AddDate(0, 0, -d), float64(d)); err != nil {
				t.Fatal(err)
			}
		}
	}
	syncer := NewSyncer(e.sidecar, nil)
	syncer.DrainAll = true
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	// The reader sees the trackers whose table it may read, in every view.
	views := []string{"forecasts", "slopes", "series_status", "tracker_settings", "actuals", "accuracy", "forecast_history", "components", "accuracy_by_horizon", "rejected_rows"}
	for _, v := range views {
		var trackers []string
		rows, err := rita.Query(ctx, `SELECT DISTINCT tracker FROM sidetrend.`+v+` ORDER BY 1`)
		if err == nil {
			trackers, err = pgx.CollectRows(rows, pgx.RowTo[string])
		}
		if v == "forecast_history" {
			rows, err = rita.Query(ctx, `SELECT DISTINCT tracker_id::text FROM sidetrend.forecast_history`)
			if err == nil {
				trackers, err = pgx.CollectRows(rows, pgx.RowTo[string])
			}
		}
		if err != nil || len(trackers) > 1 {
			t.Errorf("the reader sees %v in sidetrend.%s (err %v), want at most the sales tracker", trackers, v, err)
		}
	}
	var n int
	if err := rita.QueryRow(ctx, `SELECT count(*) FROM sidetrend.actuals WHERE tracker = 'sales'`).Scan(&n); err != nil || n != 3 {
		t.Errorf("the reader sees %d sales buckets (err %v), want 3", n, err)
	}
	// Surprises are filtered the same way (row-level security).
	if _, err := e.sidecar.Exec(ctx, `INSERT INTO sidetrend.surprises (tracker_id, tracker, series_key, bucket, period_start, kind)
		SELECT id, name, 'x', 1, now(), 'outside95' FROM sidetrend.trackers`); err != nil {
		t.Fatal(err)
	}
	var seen []string
	rows, err := rita.Query(ctx, `SELECT tracker FROM sidetrend.surprises ORDER BY 1`)
	if err == nil {
		seen, err = pgx.CollectRows(rows, pgx.RowTo[string])
	}
	if err != nil || fmt.Sprint(seen) != "[sales]" {
		t.Errorf("the reader sees surprises of %v (err %v), want [sales]", seen, err)
	}

	// The creator loses SELECT: the tracker pauses with that reason.
	e.must(t, e.admin, `REVOKE SELECT ON public.payroll FROM `+e.id("wendy"))
	syncer.lastCheck = time.Time{}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var st, msg string
	if err := e.sidecar.QueryRow(ctx, `SELECT status, coalesce(last_error, '') FROM sidetrend.trackers WHERE name = 'payroll'`).Scan(&st, &msg); err != nil {
		t.Fatal(err)
	}
	if st != "paused" || !strings.Contains(msg, "may no longer read public.payroll") {
		t.Errorf("payroll after its owner lost SELECT: %s (%s), want paused", st, msg)
	}

	// A backfill in progress does not block the table's writers: hold one
	// open and insert with a short statement timeout.
	if _, err := w.Exec(ctx, `SELECT sidetrend.rebuild('sales')`); err != nil {
		t.Fatal(err)
	}
	var tid int
	if err := e.sidecar.QueryRow(ctx, `SELECT id FROM sidetrend.trackers WHERE name = 'sales'`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	tx, err := e.sidecar.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := tx.Exec(ctx, fmt.Sprintf(`SELECT sidetrend._backfill_%d()`, tid)); err != nil {
		t.Fatal(err)
	}
	e.must(t, clerk, `SET statement_timeout = '1s'`)
	if _, err := clerk.Exec(ctx, `INSERT INTO public.sales VALUES ($1, 10, 'x')`, now.AddDate(0, 0, -1)); err != nil {
		t.Errorf("a writer inserts while a backfill is open: %v", err)
	}
	if err := tx.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	if err := syncer.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var sum float64
	if err := e.sidecar.QueryRow(ctx, `SELECT sum(value) FROM sidetrend.actuals WHERE tracker = 'sales'`).Scan(&sum); err != nil || sum != 16 {
		t.Errorf("sales values sum to %v (err %v), want 1 + 2 + 3 + 10, each row once", sum, err)
	}

	// Untrack by the owner works; rejects keep the tracked columns only.
	if _, err := clerk.Exec(ctx, `INSERT INTO public.sales VALUES ($1, NULL, 'x')`, now); err != nil {
		t.Fatal(err)
	}
	var keys []string
	rows, err = e.sidecar.Query(ctx, `SELECT jsonb_object_keys(row_data) FROM sidetrend.rejects ORDER BY 1`)
	if err == nil {
		keys, err = pgx.CollectRows(rows, pgx.RowTo[string])
	}
	if err != nil || fmt.Sprint(keys) != "[key time value]" {
		t.Errorf("reject row keys %v (err %v), want [key time value]", keys, err)
	}
	if _, err := e.sidecar.Exec(ctx, `SELECT sidetrend.prune_rejects(0, '30 days')`); err != nil {
		t.Fatal(err)
	}
	if err := e.sidecar.QueryRow(ctx, `SELECT count(*) FROM sidetrend.rejects`).Scan(&n); err != nil || n != 0 {
		t.Errorf("%d rejects after pruning to 0 per tracker (err %v)", n, err)
	}
	if _, err := w.Exec(ctx, `SELECT sidetrend.untrack('sales')`); err != nil {
		t.Errorf("the owner untracks: %v", err)
	}
}

// TestCountWithoutValue: a count tracker needs no value column (track(...,
// value_col => NULL, agg => 'count')); any other aggregate does.
func TestCountWithoutValue(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE visits (at timestamptz, door text)`)
	_, err := pool.Exec(ctx, `SELECT sidetrend.track('visits', 'at', NULL, '{door}')`)
	wantSQLState(t, "sum without a value column", err, "22023", "value_col is missing")
	exec(t, pool, `SELECT sidetrend.track('visits', 'at', NULL, '{door}', agg => 'count', degree => 0, horizon => 2)`)
	day := time.Now().UTC().Truncate(24 * time.Hour)
	exec(t, pool, `INSERT INTO visits SELECT $1::timestamptz - d * interval '1 day', 'north' FROM generate_series(1, 3) d, generate_series(1, 4) n`, day)
	exec(t, pool, `INSERT INTO visits VALUES (NULL, 'north')`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	rows, err := pool.Query(ctx, `SELECT value FROM sidetrend.actuals WHERE tracker = 'visits' ORDER BY bucket`)
	if err != nil {
		t.Fatal(err)
	}
	counts, err := pgx.CollectRows(rows, pgx.RowTo[float64])
	if err != nil || fmt.Sprint(counts) != "[4 4 4]" {
		t.Errorf("daily counts %v (err %v), want [4 4 4]", counts, err)
	}
	var reason string
	if err := pool.QueryRow(ctx, `SELECT reason FROM sidetrend.rejects`).Scan(&reason); err != nil || reason != "time is NULL" {
		t.Errorf("reject %q (err %v), want time is NULL", reason, err)
	}
}
