package pgsync

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"os"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"

	"github.com/sidetrend/sidetrend/internal/pgtest"
)

// asRole returns dbURL with its user replaced by role (the test server
// trusts every role on 127.0.0.1).
func asRole(t *testing.T, dbURL, role string) string {
	t.Helper()
	u, err := url.Parse(dbURL)
	if err != nil {
		t.Fatal(err)
	}
	u.User = url.User(role)
	return u.String()
}

// testRoles creates login roles with names no other test binary uses and
// drops them when the test ends, after its database is gone (call it
// before pgtest.NewDatabase: cleanups run last-in first-out).
func testRoles(t *testing.T, attrs map[string]string) map[string]string {
	t.Helper()
	ctx := context.Background()
	admin, err := pgx.Connect(ctx, pgtest.AdminURL())
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close(ctx)
	names := map[string]string{}
	for short, attr := range attrs {
		name := fmt.Sprintf("st_%s_%s_%d", strings.ToLower(t.Name()[4:min(len(t.Name()), 16)]), short, os.Getpid())
		if _, err := admin.Exec(ctx, fmt.Sprintf("DROP ROLE IF EXISTS %s", pgx.Identifier{name}.Sanitize())); err != nil {
			t.Fatal(err)
		}
		if _, err := admin.Exec(ctx, fmt.Sprintf("CREATE ROLE %s LOGIN %s", pgx.Identifier{name}.Sanitize(), attr)); err != nil {
			t.Fatal(err)
		}
		names[short] = name
	}
	t.Cleanup(func() {
		ctx := context.Background()
		admin, err := pgx.Connect(ctx, pgtest.AdminURL())
		if err != nil {
			t.Errorf("drop test roles: %v", err)
			return
		}
		defer admin.Close(ctx)
		for _, name := range names {
			if _, err := admin.Exec(ctx, "DROP ROLE IF EXISTS "+pgx.Identifier{name}.Sanitize()); err != nil {
				t.Errorf("drop role %s: %v", name, err)
			}
		}
	})
	return names
}

// ensureSharedRoles makes sidetrend_reader and sidetrend_writer exist on the
// test server (a migration run by a superuser in another test may be making
// them at this moment).
func ensureSharedRoles(t *testing.T) {
	t.Helper()
	ctx := context.Background()
	admin, err := pgx.Connect(ctx, pgtest.AdminURL())
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close(ctx)
	for _, r := range []string{"sidetrend_reader", "sidetrend_writer", "sidetrend_admin"} {
		// r is one of two fixed names: safe as a literal and an identifier.
		_, err := admin.Exec(ctx, fmt.Sprintf(`DO $$ BEGIN
			IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = '%[1]s') THEN CREATE ROLE %[1]s NOLOGIN; END IF;
			EXCEPTION WHEN duplicate_object OR unique_violation THEN NULL; END $$`, r))
		if err != nil {
			t.Fatal(err)
		}
	}
}

func connectURL(t *testing.T, u string) *pgx.Conn {
	t.Helper()
	conn, err := pgx.Connect(context.Background(), u)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return conn
}

func wantSQLState(t *testing.T, what string, err error, state, contains string) {
	t.Helper()
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) || pgErr.SQLState() != state || !strings.Contains(pgErr.Message, contains) {
		t.Errorf("%s: err %v, want SQLSTATE %s with %q", what, err, state, contains)
	}
}

// TestRolesLeastPrivilege runs sidetrend with a sidecar role that is no
// superuser and may not create roles, and checks what each kind of user
// may do: a clerk who may only INSERT into a tracked table, an analyst with
// sidetrend_reader and a planner with sidetrend_writer.
func TestRolesLeastPrivilege(t *testing.T) {
	t.Parallel()
	ensureSharedRoles(t)
	roles := testRoles(t, map[string]string{"owner": "NOSUPERUSER NOCREATEROLE", "clerk": "", "analyst": "", "planner": ""})
	dbURL := pgtest.NewDatabase(t)
	ctx := context.Background()
	admin := connectURL(t, dbURL)
	id := func(short string) string { return pgx.Identifier{roles[short]}.Sanitize() }
	dbName := strings.TrimPrefix(must(url.Parse(dbURL)).Path, "/")
	for _, sql := range []string{
		fmt.Sprintf(`GRANT CREATE ON DATABASE %s TO %s`, pgx.Identifier{dbName}.Sanitize(), id("owner")),
		`CREATE TABLE public.sales (id bigserial PRIMARY KEY, sold_at timestamptz, shop text, amount numeric)`,
		`CREATE TABLE public.payroll (paid_at timestamptz, person text, amount numeric)`,
		// What the sidecar's role needs on a table it tracks (sql/roles.sql).
		`GRANT SELECT, TRIGGER ON public.sales, public.payroll TO ` + id("owner"),
		`GRANT INSERT ON public.sales TO ` + id("clerk"),
		`GRANT USAGE ON SEQUENCE public.sales_id_seq TO ` + id("clerk"),
		`GRANT SELECT ON public.sales TO ` + id("planner"),
		`GRANT sidetrend_reader TO ` + id("analyst"),
		// A reader sees the trackers of tables it may read (and no others).
		`GRANT SELECT ON public.sales TO ` + id("analyst"),
		`GRANT sidetrend_writer TO ` + id("planner"),
	} {
		if _, err := admin.Exec(ctx, sql); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
	}
	ownerURL := asRole(t, dbURL, roles["owner"])
	if _, err := Migrate(ctx, ownerURL, nil); err != nil {
		t.Fatalf("migrate as %s (no superuser, no CREATEROLE): %v", roles["owner"], err)
	}
	owner, err := Connect(ctx, ownerURL)
	if err != nil {
		t.Fatal(err)
	}
	defer owner.Close()
	var super bool
	if err := owner.QueryRow(ctx, `SELECT rolsuper FROM pg_roles WHERE rolname = current_user`).Scan(&super); err != nil || super {
		t.Fatalf("the sidecar's role is a superuser (%v, err %v): the test proves nothing", super, err)
	}

	planner := connectURL(t, asRole(t, dbURL, roles["planner"]))
	if _, err := planner.Exec(ctx, `SELECT sidetrend.track('public.sales', 'sold_at', 'amount', '{shop}', degree => 0, horizon => 3)`); err != nil {
		t.Fatalf("the writer tracks a table it may read: %v", err)
	}
	_, err = planner.Exec(ctx, `SELECT sidetrend.track('public.payroll', 'paid_at', 'amount', '{person}')`)
	wantSQLState(t, "the writer tracks a table it may not read", err, "42501", "may not read public.payroll")

	clerk := connectURL(t, asRole(t, dbURL, roles["clerk"]))
	for d := 0; d < 12; d++ {
		if _, err := clerk.Exec(ctx, `INSERT INTO public.sales (sold_at, shop, amount) VALUES ($1, 'kiosk', $2), ($1, 'kiosk', 1)`,
			time.Date(2026, 4, 1+d, 9, 0, 0, 0, time.UTC), 20+d); err != nil {
			t.Fatalf("the clerk inserts into the tracked table: %v", err)
		}
	}
	_, err = clerk.Exec(ctx, `INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum) VALUES (1, 'x', 1, 1, 1)`)
	wantSQLState(t, "the clerk writes the change log", err, "42501", "permission denied")
	var logged int
	if err := owner.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&logged); err != nil || logged != 12 {
		t.Errorf("%d change rows from the clerk's 12 statements (err %v), want 12", logged, err)
	}
	// The sidecar, as its own role, backfills and drains.
	if err := NewSyncer(owner, nil).CatchUp(ctx); err != nil {
		t.Fatalf("the sidecar catches up as %s: %v", roles["owner"], err)
	}

	analyst := connectURL(t, asRole(t, dbURL, roles["analyst"]))
	rows, err := owner.Query(ctx, `SELECT viewname FROM pg_views WHERE schemaname = 'sidetrend' ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	views, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil || len(views) < 7 {
		t.Fatalf("views %v (err %v): want at least the seven of 00002 and 00004", views, err)
	}
	for _, v := range append(views, "surprises", "forecast_history") {
		if _, err := analyst.Exec(ctx, `SELECT * FROM sidetrend.`+pgx.Identifier{v}.Sanitize()); err != nil {
			t.Errorf("the reader selects sidetrend.%s: %v", v, err)
		}
	}
	var forecast float64
	if err := analyst.QueryRow(ctx, `SELECT forecast FROM sidetrend.forecasts WHERE tracker = 'sales' AND horizon = 1`).Scan(&forecast); err != nil {
		t.Errorf("the reader reads a forecast: %v", err)
	} else {
		// The clerk's takings, 20 + d and 1 on day d, under the tracker's
		// local mean with lambda 0.95 (sidetrend.track's default).
		ys := make([]float64, 12)
		for d := range ys {
			ys[d] = 21 + float64(d)
		}
		st, err := estimator.Fit(estimator.Spec{Degree: 0, Lambda: 0.95}, ys)
		if err != nil {
			t.Fatal(err)
		}
		fc, err := st.Forecast(1)
		if err != nil {
			t.Fatal(err)
		}
		if !scalar.EqualWithinAbsOrRel(forecast, fc.Forecast[0], 1e-9, 1e-9) {
			t.Errorf("the reader's forecast %v, want the offline fit's %v", forecast, fc.Forecast[0])
		}
	}
	for _, tbl := range []string{"trackers", "changes", "points", "series", "rejects", "tuning", "tune_requests"} {
		_, err := analyst.Exec(ctx, `SELECT * FROM sidetrend.`+tbl)
		wantSQLState(t, "the reader selects table "+tbl, err, "42501", "permission denied")
	}
	_, err = analyst.Exec(ctx, `SELECT sidetrend.track('public.sales', 'sold_at', 'amount')`)
	wantSQLState(t, "the reader tracks", err, "42501", "permission denied for function track")
	_, err = analyst.Exec(ctx, `SELECT * FROM sidetrend.tune('sales')`)
	wantSQLState(t, "the reader tunes", err, "42501", "permission denied for function tune")

	// The writer reaches tune() (no results yet) and may ask for them.
	_, err = planner.Exec(ctx, `SELECT * FROM sidetrend.tune('sales')`)
	wantSQLState(t, "the writer tunes before any result", err, "55000", "no tracker-wide tuning results yet")
	if _, err := planner.Exec(ctx, `SELECT sidetrend.request_tune('sales')`); err != nil {
		t.Errorf("the writer requests tuning: %v", err)
	}
	if tuned, _, err := TunePending(ctx, owner, 0, nil); err != nil || tuned != 1 {
		t.Errorf("the sidecar tunes on request: %d tuned, err %v", tuned, err)
	}
	if _, err := planner.Exec(ctx, `SELECT * FROM sidetrend.tune('sales', apply => true)`); err != nil {
		t.Errorf("the writer applies tuning: %v", err)
	}
}

// TestRolesCreatedOrSkipped checks sidetrend.create_roles() and
// grant_roles() with role names of their own: a migrating role without
// CREATEROLE gets a NOTICE and no error; with CREATEROLE the roles appear
// and the grants make a member a reader.
func TestRolesCreatedOrSkipped(t *testing.T) {
	t.Parallel()
	roles := testRoles(t, map[string]string{"owner": "NOSUPERUSER NOCREATEROLE", "member": ""})
	custom := []string{roles["owner"] + "_r", roles["owner"] + "_w"}
	t.Cleanup(func() {
		ctx := context.Background()
		admin, err := pgx.Connect(ctx, pgtest.AdminURL())
		if err != nil {
			return
		}
		defer admin.Close(ctx)
		for _, r := range custom {
			admin.Exec(ctx, "DROP ROLE IF EXISTS "+pgx.Identifier{r}.Sanitize())
		}
	})
	dbURL := pgtest.NewDatabase(t)
	ctx := context.Background()
	admin := connectURL(t, dbURL)
	dbName := strings.TrimPrefix(must(url.Parse(dbURL)).Path, "/")
	if _, err := admin.Exec(ctx, fmt.Sprintf(`GRANT CREATE ON DATABASE %s TO %s`, pgx.Identifier{dbName}.Sanitize(), pgx.Identifier{roles["owner"]}.Sanitize())); err != nil {
		t.Fatal(err)
	}
	ownerURL := asRole(t, dbURL, roles["owner"])
	if _, err := Migrate(ctx, ownerURL, nil); err != nil {
		t.Fatal(err)
	}
	cfg, err := pgx.ParseConfig(ownerURL)
	if err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	var notices []string
	cfg.OnNotice = func(_ *pgconn.PgConn, n *pgconn.Notice) {
		mu.Lock()
		notices = append(notices, n.Message)
		mu.Unlock()
	}
	owner, err := pgx.ConnectConfig(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer owner.Close(ctx)
	if _, err := owner.Exec(ctx, `SELECT sidetrend.create_roles($1, $2)`, custom[0], custom[1]); err != nil {
		t.Fatalf("create_roles without CREATEROLE: %v, want a notice only", err)
	}
	mu.Lock()
	got := strings.Join(notices, "\n")
	mu.Unlock()
	if !strings.Contains(got, fmt.Sprintf(`role "%s" does not exist and role "%s" may not create roles`, custom[0], roles["owner"])) {
		t.Errorf("notices %q: want one saying the reader role was skipped", got)
	}
	var n int
	if err := owner.QueryRow(ctx, `SELECT count(*) FROM pg_roles WHERE rolname = ANY($1)`, custom).Scan(&n); err != nil || n != 0 {
		t.Errorf("%d custom roles exist (err %v), want 0", n, err)
	}
	if _, err := admin.Exec(ctx, `ALTER ROLE `+pgx.Identifier{roles["owner"]}.Sanitize()+` CREATEROLE`); err != nil {
		t.Fatal(err)
	}
	// A new session sees the new attribute.
	owner2 := connectURL(t, ownerURL)
	if _, err := owner2.Exec(ctx, `SELECT sidetrend.create_roles($1, $2)`, custom[0], custom[1]); err != nil {
		t.Fatal(err)
	}
	if _, err := owner2.Exec(ctx, `SELECT sidetrend.grant_roles($1, $2)`, custom[0], custom[1]); err != nil {
		t.Fatal(err)
	}
	if err := owner2.QueryRow(ctx, `SELECT count(*) FROM pg_roles WHERE rolname = ANY($1)`, custom).Scan(&n); err != nil || n != 2 {
		t.Fatalf("%d custom roles exist (err %v), want 2", n, err)
	}
	if _, err := admin.Exec(ctx, fmt.Sprintf(`GRANT %s TO %s`, pgx.Identifier{custom[0]}.Sanitize(), pgx.Identifier{roles["member"]}.Sanitize())); err != nil {
		t.Fatal(err)
	}
	member := connectURL(t, asRole(t, dbURL, roles["member"]))
	if _, err := member.Exec(ctx, `SELECT * FROM sidetrend.accuracy`); err != nil {
		t.Errorf("a member of the custom reader selects a view: %v", err)
	}
	_, err = member.Exec(ctx, `SELECT * FROM sidetrend.series`)
	wantSQLState(t, "a member of the custom reader selects a table", err, "42501", "permission denied")
}

func must[T any](v T, err error) T {
	if err != nil {
		panic(err)
	}
	return v
}
