package calendar

import (
	"context"
	"database/sql"
	"os"
	"strings"
	"testing"
	"testing/fstest"

	"github.com/jackc/pgx/v5"
	_ "github.com/jackc/pgx/v5/stdlib" // database/sql driver "pgx", for goose
	"github.com/pressly/goose/v3"
	"github.com/sidetrend/sidetrend/internal/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// migrationUp is the Up part of the calendar migration, read from the file
// itself so that these tests check the SQL that ships, with the goose
// statement markers removed.
func migrationUp(t testing.TB) string {
	t.Helper()
	b, err := os.ReadFile("../migrations/00001_calendar.sql")
	if err != nil {
		t.Fatalf("read the calendar migration: %v", err)
	}
	text := string(b)
	_, up, ok := strings.Cut(text, "-- +goose Up\n")
	if !ok {
		t.Fatal("the calendar migration has no '-- +goose Up' line")
	}
	up, _, ok = strings.Cut(up, "-- +goose Down\n")
	if !ok {
		t.Fatal("the calendar migration has no '-- +goose Down' line")
	}
	var out strings.Builder
	for line := range strings.Lines(up) {
		if strings.HasPrefix(line, "-- +goose ") {
			continue
		}
		out.WriteString(line)
	}
	return out.String()
}

// calendarDB returns a connection to a fresh database with the calendar
// migration applied and the session settings the comparisons assume.
func calendarDB(t testing.TB) *pgx.Conn {
	t.Helper()
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	// No arguments: the simple protocol runs the whole script at once.
	if _, err := conn.Exec(ctx, migrationUp(t)); err != nil {
		t.Fatalf("apply the calendar migration: %v", err)
	}
	// IntervalStyle postgres is the default; set it so that the text
	// comparisons do not depend on the server's configuration. The session
	// zone is deliberately neither UTC nor a test zone: no result may
	// depend on it.
	if _, err := conn.Exec(ctx, "SET IntervalStyle = postgres; SET TimeZone = 'America/Sao_Paulo'"); err != nil {
		t.Fatalf("session settings: %v", err)
	}
	return conn
}

func TestMigrationDownUndoesUp(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	b, err := os.ReadFile("../migrations/00001_calendar.sql")
	if err != nil {
		t.Fatal(err)
	}
	_, down, _ := strings.Cut(string(b), "-- +goose Down\n")
	ctx := context.Background()
	if _, err := conn.Exec(ctx, down); err != nil {
		t.Fatalf("apply Down: %v", err)
	}
	var n int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_proc WHERE pronamespace = 'sidetrend'::regnamespace`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	if n != 0 {
		t.Fatalf("after Down, %d functions remain in schema sidetrend", n)
	}
	if _, err := conn.Exec(ctx, migrationUp(t)); err != nil {
		t.Fatalf("apply Up again after Down: %v", err)
	}
}

// TestMigrationUnderGoose applies the file with goose itself, as the
// sidecar's migration runner does, to check that goose splits it into the
// statements intended (function bodies and all), and rolls it back.
func TestMigrationUnderGoose(t *testing.T) {
	t.Parallel()
	b, err := os.ReadFile("../migrations/00001_calendar.sql")
	if err != nil {
		t.Fatal(err)
	}
	db, err := sql.Open("pgx", pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	ctx := context.Background()
	p, err := goose.NewProvider(goose.DialectPostgres, db,
		fstest.MapFS{"00001_calendar.sql": &fstest.MapFile{Data: b}}, goose.WithDisableGlobalRegistry(true))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := p.Up(ctx); err != nil {
		t.Fatalf("goose up: %v", err)
	}
	var i int64
	if err := db.QueryRowContext(ctx, `SELECT sidetrend.bucket_index(timestamptz '2001-01-08 00:00Z', '7 days', 'UTC')`).Scan(&i); err != nil || i != 1 {
		t.Fatalf("after goose up: bucket of 2001-01-08 in weeks = %d, %v; want 1", i, err)
	}
	if _, err := p.Down(ctx); err != nil {
		t.Fatalf("goose down: %v", err)
	}
}
