// Package pgtest gives database tests a real Postgres: one private server
// per test binary (package pglocal) and a fresh database per test.
//
// Use it from TestMain:
//
//	func TestMain(m *testing.M) { pgtest.Main(m) }
//
// and in a test:
//
//	url := pgtest.NewDatabase(t)
//
// When SIDETREND_TEST_DATABASE_URL is set, the tests use that server instead
// of starting one; they still get a fresh database each. The URL's role must
// be allowed to create databases.
package pgtest

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"os"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/sidetrend/sidetrend/pglocal"
)

// EnvURL names the environment variable that points the tests at an
// existing server.
const EnvURL = "SIDETREND_TEST_DATABASE_URL"

// serverSettings trade durability for speed: a test cluster is thrown away.
// synchronous_commit keeps its default (on), so that commits behave as they
// do in production.
var serverSettings = map[string]string{
	"fsync":            "off",
	"full_page_writes": "off",
}

const (
	startTimeout = 2 * time.Minute
	stopTimeout  = time.Minute
	sqlTimeout   = time.Minute
)

var (
	adminURL string
	server   *pglocal.Server
	seq      atomic.Int64
)

// Main starts one private Postgres server for the test binary (or uses the
// one SIDETREND_TEST_DATABASE_URL names), runs the tests, stops the server
// and exits with the tests' code. It exits 1, saying how to install
// Postgres, when there are no server binaries: database tests do not skip.
func Main(m *testing.M) {
	os.Exit(run(m))
}

func run(m *testing.M) int {
	if u := os.Getenv(EnvURL); u != "" {
		if err := useExternal(u); err != nil {
			fmt.Fprintf(os.Stderr, "pgtest: %s: %v\n", EnvURL, err)
			return 1
		}
		return m.Run()
	}
	if _, err := pglocal.FindBinDir(); err != nil {
		fmt.Fprintf(os.Stderr, "pgtest: the database tests need PostgreSQL server binaries.\n%v\n(or set %s to a postgres:// URL of a server where the tests may create databases)\n", err, EnvURL)
		return 1
	}
	ctx, cancel := context.WithTimeout(context.Background(), startTimeout)
	srv, err := pglocal.Start(ctx, pglocal.Config{Settings: serverSettings})
	cancel()
	if err != nil {
		fmt.Fprintf(os.Stderr, "pgtest: start a private Postgres for the tests: %v\n", err)
		return 1
	}
	server, adminURL = srv, srv.URL("postgres")

	code := m.Run()

	ctx, cancel = context.WithTimeout(context.Background(), stopTimeout)
	defer cancel()
	if err := srv.Stop(ctx); err != nil {
		fmt.Fprintf(os.Stderr, "pgtest: stop the private Postgres: %v\n", err)
		if code == 0 {
			code = 1
		}
	}
	return code
}

// useExternal checks the URL and that the server answers.
func useExternal(raw string) error {
	u, err := url.Parse(raw)
	if err != nil || (u.Scheme != "postgres" && u.Scheme != "postgresql") || u.Host == "" {
		return fmt.Errorf("%q is not a postgres:// URL: set it like postgres://user@host:5432/postgres?sslmode=disable", redact(raw))
	}
	ctx, cancel := context.WithTimeout(context.Background(), sqlTimeout)
	defer cancel()
	conn, err := pgx.Connect(ctx, raw)
	if err != nil {
		return fmt.Errorf("connect to %s: %w", redact(raw), err)
	}
	conn.Close(ctx)
	adminURL = raw
	return nil
}

// AdminURL is the URL of the maintenance database ("postgres") of the test
// server. It panics when Main has not run.
func AdminURL() string {
	if adminURL == "" {
		panic("pgtest: no test server: call pgtest.Main(m) from TestMain")
	}
	return adminURL
}

// Server is the private server Main started, nil when the tests use the
// server SIDETREND_TEST_DATABASE_URL names.
func Server() *pglocal.Server { return server }

// NewDatabase creates an empty database with a name no other test uses and
// returns its URL. The database is dropped, sessions and all, when the test
// ends.
func NewDatabase(t testing.TB) string {
	t.Helper()
	if adminURL == "" {
		t.Fatal("pgtest.NewDatabase: no test server: call pgtest.Main(m) from TestMain")
	}
	ctx, cancel := context.WithTimeout(context.Background(), sqlTimeout)
	defer cancel()
	conn, err := pgx.Connect(ctx, adminURL)
	if err != nil {
		t.Fatalf("pgtest: connect to %s: %v", redact(adminURL), err)
	}
	defer conn.Close(ctx)

	var name string
	for attempt := 0; ; attempt++ {
		name = databaseName(t.Name(), os.Getpid(), seq.Add(1))
		_, err = conn.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{name}.Sanitize())
		var pgErr *pgconn.PgError
		// Another test binary on a shared server can have made the same
		// name (same pid in another container): take the next one.
		if errors.As(err, &pgErr) && pgErr.SQLState() == "42P04" && attempt < 100 {
			continue
		}
		break
	}
	if err != nil {
		t.Fatalf("pgtest: create database %s: %v", name, err)
	}
	t.Cleanup(func() { dropDatabase(t, name) })
	return databaseURL(adminURL, name)
}

func dropDatabase(t testing.TB, name string) {
	// t.Context is already cancelled when cleanups run.
	ctx, cancel := context.WithTimeout(context.Background(), sqlTimeout)
	defer cancel()
	conn, err := pgx.Connect(ctx, adminURL)
	if err != nil {
		t.Errorf("pgtest: drop database %s: connect: %v", name, err)
		return
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)"); err != nil {
		t.Errorf("pgtest: drop database %s: %v", name, err)
	}
}

// maxIdentifier is Postgres's limit on identifier length (NAMEDATALEN - 1).
const maxIdentifier = 63

// databaseName builds "st_<test name>_<pid>_<n>": lower case, letters,
// digits and underscores only, at most 63 bytes, with the unique part kept
// whole when the test name is long.
func databaseName(testName string, pid int, n int64) string {
	suffix := fmt.Sprintf("_%d_%d", pid, n)
	var b strings.Builder
	b.WriteString("st_")
	for _, r := range strings.ToLower(testName) {
		if b.Len()+len(suffix) >= maxIdentifier {
			break
		}
		if (r >= 'a' && r <= 'z') || (r >= '0' && r <= '9') {
			b.WriteRune(r)
		} else {
			b.WriteByte('_')
		}
	}
	b.WriteString(suffix)
	return b.String()
}

// databaseURL is base with its database replaced by name.
func databaseURL(base, name string) string {
	u, err := url.Parse(base)
	if err != nil {
		panic(fmt.Sprintf("pgtest: admin URL %q: %v", redact(base), err))
	}
	u.Path = "/" + name
	u.RawPath = ""
	return u.String()
}

// redact hides a password in a URL for messages.
func redact(raw string) string {
	if u, err := url.Parse(raw); err == nil {
		return u.Redacted()
	}
	return "(unparsable URL)"
}
