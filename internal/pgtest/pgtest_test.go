package pgtest

import (
	"context"
	"fmt"
	"os"
	"os/exec"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
)

func TestMain(m *testing.M) { Main(m) }

// expectExternalEnv is set when TestExternalServer runs this binary again
// against the server its parent started.
const expectExternalEnv = "SIDETREND_PGTEST_EXPECT_EXTERNAL"

func TestServer(t *testing.T) {
	ctx := t.Context()
	if os.Getenv(expectExternalEnv) != "" {
		if Server() != nil {
			t.Errorf("with %s set, Server() = %v; want nil", EnvURL, Server())
		}
		return
	}
	if Server() == nil {
		t.Fatal("Server() is nil without " + EnvURL)
	}
	if got, want := AdminURL(), Server().URL("postgres"); got != want {
		t.Errorf("AdminURL() = %q, want %q", got, want)
	}
	conn := connect(t, AdminURL())
	for setting, want := range map[string]string{
		"fsync":              "off",
		"full_page_writes":   "off",
		"synchronous_commit": "on", // left at its default on purpose
	} {
		var got string
		if err := conn.QueryRow(ctx, "SELECT current_setting($1)", setting).Scan(&got); err != nil {
			t.Fatal(err)
		}
		if got != want {
			t.Errorf("%s = %q, want %q", setting, got, want)
		}
	}
}

func TestNewDatabaseIsolated(t *testing.T) {
	t.Parallel()
	const n = 8 // enough parallel tests to create databases at the same time
	for i := range n {
		t.Run(fmt.Sprint(i), func(t *testing.T) {
			t.Parallel()
			ctx := t.Context()
			conn := connect(t, NewDatabase(t))
			// The same table name in every database, each with its own row.
			if _, err := conn.Exec(ctx, "CREATE TABLE shared_name (i int)"); err != nil {
				t.Fatal(err)
			}
			if _, err := conn.Exec(ctx, "INSERT INTO shared_name VALUES ($1)", i); err != nil {
				t.Fatal(err)
			}
			var rows, got int
			if err := conn.QueryRow(ctx, "SELECT count(*), max(i) FROM shared_name").Scan(&rows, &got); err != nil {
				t.Fatal(err)
			}
			if rows != 1 || got != i {
				t.Errorf("database of subtest %d holds %d rows, max %d; want only its own row %d", i, rows, got, i)
			}
		})
	}
}

func TestNewDatabaseDropped(t *testing.T) {
	ctx := t.Context()
	var name string
	t.Run("inner", func(t *testing.T) {
		// A session still open when the drop runs, which forces it out:
		// cleanups run last registered first, so this close comes after.
		var conn *pgx.Conn
		t.Cleanup(func() {
			if conn != nil {
				conn.Close(context.Background())
			}
		})
		var err error
		if conn, err = pgx.Connect(t.Context(), NewDatabase(t)); err != nil {
			t.Fatal(err)
		}
		if err := conn.QueryRow(t.Context(), "SELECT current_database()").Scan(&name); err != nil {
			t.Fatal(err)
		}
	})
	if name == "" {
		t.Fatal("inner test found no database name")
	}
	var exists bool
	conn := connect(t, AdminURL())
	if err := conn.QueryRow(ctx, "SELECT EXISTS (SELECT FROM pg_database WHERE datname = $1)", name).Scan(&exists); err != nil {
		t.Fatal(err)
	}
	if exists {
		t.Errorf("database %s still exists after its test ended", name)
	}
	a, b := NewDatabase(t), NewDatabase(t)
	if a == b {
		t.Errorf("two NewDatabase calls returned the same URL %s", a)
	}
}

func TestDatabaseName(t *testing.T) {
	for _, tc := range []struct {
		test string
		pid  int
		n    int64
		want string
	}{
		{"TestX", 12, 3, "st_testx_12_3"},
		{"TestX/sub case-1", 12, 3, "st_testx_sub_case_1_12_3"},
		{"TestÄ", 7, 1, "st_test__7_1"},
		// 63 bytes at most (NAMEDATALEN 64 less the terminator), the unique
		// suffix kept whole.
		{"Test" + strings.Repeat("y", 100), 4194304, 99, "st_test" + strings.Repeat("y", 63-len("st_test")-len("_4194304_99")) + "_4194304_99"},
	} {
		got := databaseName(tc.test, tc.pid, tc.n)
		if got != tc.want {
			t.Errorf("databaseName(%q, %d, %d) = %q, want %q", tc.test, tc.pid, tc.n, got, tc.want)
		}
		if len(got) > maxIdentifier {
			t.Errorf("databaseName(%q, ...) is %d bytes, over %d", tc.test, len(got), maxIdentifier)
		}
	}
}

// TestExternalServer runs this test binary again with EnvURL pointing at
// the server this one started: no second cluster, fresh databases still.
func TestExternalServer(t *testing.T) {
	if os.Getenv(expectExternalEnv) != "" {
		return // already the child
	}
	if Server() == nil {
		t.Skip("already running against " + EnvURL)
	}
	cmd := exec.CommandContext(t.Context(), os.Args[0], "-test.run=^(TestServer|TestNewDatabase.*)$", "-test.count=1", "-test.v")
	cmd.Env = append(os.Environ(), EnvURL+"="+AdminURL(), expectExternalEnv+"=1")
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("tests against %s=%s: %v\n%s", EnvURL, AdminURL(), err, out)
	}
	for _, want := range []string{"--- PASS: TestServer", "--- PASS: TestNewDatabaseIsolated", "--- PASS: TestNewDatabaseDropped"} {
		if !strings.Contains(string(out), want) {
			t.Errorf("child run lacks %q:\n%s", want, out)
		}
	}

	// A value that is not a URL stops the run with a message saying what to set.
	cmd = exec.CommandContext(t.Context(), os.Args[0], "-test.run=^TestServer$", "-test.count=1")
	cmd.Env = append(os.Environ(), EnvURL+"=host=localhost dbname=postgres", expectExternalEnv+"=1")
	out, err = cmd.CombinedOutput()
	if ee, ok := err.(*exec.ExitError); !ok || ee.ExitCode() != 1 {
		t.Errorf("with %s set to a keyword string: got %v, want exit status 1\n%s", EnvURL, err, out)
	}
	if !strings.Contains(string(out), "postgres://") {
		t.Errorf("the message does not show the URL form to use:\n%s", out)
	}
}

func connect(t *testing.T, url string) *pgx.Conn {
	t.Helper()
	conn, err := pgx.Connect(t.Context(), url)
	if err != nil {
		t.Fatalf("connect %s: %v", url, err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return conn
}
