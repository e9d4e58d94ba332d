package sqlwire

import (
	"context"
	"log/slog"
	"net"
	"net/url"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/sidetrend/sidetrend/internal/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// testUser and testPassword are the endpoint credentials of the tests; the
// password is made up.
const (
	testUser     = "sidetrend"
	testPassword = "crumb-4-proof"
	analystRole  = "sqlwire_analyst" // a non-superuser local role
)

// fixture is an endpoint serving a memSource, and a local database of the
// test server where sql/foreign.sql has attached it through postgres_fdw.
type fixture struct {
	srv        *Server
	src        *memSource
	port       int
	adminURL   string // the local database, as the superuser
	analystURL string // the local database, as analystRole
}

var rolesOnce sync.Once

var (
	poolOnce sync.Once
	pool     *pgxpool.Pool
)

// evalPool is the pool of the test server's database that endpoints
// evaluate queries in: one per test binary.
func evalPool(t testing.TB) *pgxpool.Pool {
	poolOnce.Do(func() {
		var err error
		if pool, err = pgxpool.New(context.Background(), pgtest.AdminURL()); err != nil {
			t.Fatalf("connect the evaluation pool: %v", err)
		}
	})
	return pool
}

// ensureRoles creates the cluster-wide roles once per test binary:
// sidetrend_reader (which foreign.sql grants to) and a login role in it.
func ensureRoles(t testing.TB, ctx context.Context, adminURL string) {
	rolesOnce.Do(func() {
		conn, err := pgx.Connect(ctx, adminURL)
		if err != nil {
			t.Fatalf("connect: %v", err)
		}
		defer conn.Close(ctx)
		_, err = conn.Exec(ctx, `
DO $$ BEGIN
  IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'sidetrend_reader') THEN CREATE ROLE sidetrend_reader NOLOGIN; END IF;
  IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = '`+analystRole+`') THEN CREATE ROLE `+analystRole+` LOGIN IN ROLE sidetrend_reader; END IF;
END $$`)
		if err != nil {
			t.Fatalf("create roles: %v", err)
		}
	})
}

// startEndpoint starts a server for src on a free port of 127.0.0.1.
func startEndpoint(t testing.TB, src Source, cfg Config) *Server {
	t.Helper()
	cfg.Listen = "127.0.0.1:0"
	if cfg.Credentials == nil {
		cfg.Credentials = map[string]string{testUser: testPassword}
	}
	srv := New(cfg, src, evalPool(t), testLogger(t))
	if err := srv.Start(context.Background()); err != nil {
		t.Fatalf("start endpoint: %v", err)
	}
	t.Cleanup(srv.Stop)
	return srv
}

func testLogger(t testing.TB) *slog.Logger {
	if os.Getenv("SQLWIRE_LOG") != "" {
		return slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelDebug}))
	}
	return slog.New(slog.DiscardHandler)
}

// newFixture starts an endpoint for src and attaches it to a fresh local
// database with sql/foreign.sql, run by psql as the project documents.
func newFixture(t testing.TB, src *memSource) *fixture {
	t.Helper()
	return newFixtureConfig(t, src, Config{})
}

// newFixtureConfig is newFixture with an endpoint configured by cfg.
func newFixtureConfig(t testing.TB, src *memSource, cfg Config) *fixture {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	srv := startEndpoint(t, src, cfg)
	f := &fixture{srv: srv, src: src, port: srv.Addr().(*net.TCPAddr).Port, adminURL: pgtest.NewDatabase(t)}
	ensureRoles(t, ctx, f.adminURL)
	password := testPassword
	if pw, ok := cfg.Credentials[testUser]; ok {
		password = pw
	}
	f.attach(t, password)

	u, err := url.Parse(f.adminURL)
	if err != nil {
		t.Fatal(err)
	}
	u.User = url.User(analystRole)
	f.analystURL = u.String()

	f.exec(t, ctx, f.adminURL, `
CREATE TABLE budget (tracker text, series_key text, day date, amount numeric);
INSERT INTO budget
  SELECT 'bakery_sales', k, d::date, 300
  FROM unnest(ARRAY['harbour', 'market', 'station']) k,
       generate_series(DATE '2025-07-01', DATE '2025-07-14', '1 day') d;
GRANT SELECT ON budget TO sidetrend_reader;`)
	return f
}

// attach runs sql/foreign.sql against the local database.
func (f *fixture) attach(t testing.TB, password string) {
	t.Helper()
	out, err := f.psql(t, "-v", "password="+password, "-f", "../sql/foreign.sql")
	if err != nil {
		t.Fatalf("psql -f sql/foreign.sql: %v\n%s", err, out)
	}
}

func (f *fixture) psql(t testing.TB, args ...string) ([]byte, error) {
	t.Helper()
	psql, err := exec.LookPath("psql")
	if err != nil {
		t.Fatalf("psql is not on PATH: install the Postgres client (Debian: postgresql-client): %v", err)
	}
	all := append([]string{"-X", "-q", "-d", f.adminURL, "-v", "ON_ERROR_STOP=1",
		"-v", "host=127.0.0.1", "-v", "port=" + strconv.Itoa(f.port), "-v", "user=" + testUser}, args...)
	cmd := exec.Command(psql, all...)
	cmd.Env = append(os.Environ(), "PGCONNECT_TIMEOUT=20")
	return cmd.CombinedOutput()
}

func (f *fixture) exec(t testing.TB, ctx context.Context, dbURL, sql string) {
	t.Helper()
	conn, err := pgx.Connect(ctx, dbURL)
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, sql); err != nil {
		t.Fatalf("%s: %v", strings.TrimSpace(sql), err)
	}
}

// analyst connects to the local database as the non-superuser role.
func (f *fixture) analyst(t testing.TB, ctx context.Context) *pgx.Conn {
	t.Helper()
	conn, err := pgx.Connect(ctx, f.analystURL)
	if err != nil {
		t.Fatalf("connect as %s: %v", analystRole, err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return conn
}
