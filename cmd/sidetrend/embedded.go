package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pglocal"
)

// embeddedDB is the database `sidetrend run` creates in its private cluster.
const embeddedDB = "sidetrend"

// embeddedStopTimeout bounds the shutdown of a private cluster on exit.
const embeddedStopTimeout = 30 * time.Second

// databaseConfigured reports whether the user named a database: --db (or
// DATABASE_URL / SIDETREND_DB, which feed it), or the libpq variables PGHOST
// or PGDATABASE, which an empty connection string falls back to.
func databaseConfigured(c *cli.Context) bool {
	if c.IsSet("db") && c.String("db") != "" {
		return true
	}
	return os.Getenv("PGHOST") != "" || os.Getenv("PGDATABASE") != ""
}

// embedded is a private cluster started (or found running) for this process.
type embedded struct {
	srv *pglocal.Server
	url string // connection URL of the database to use
}

// startEmbedded starts, or reuses when one already runs there, a private
// cluster in dataDir, creates database dbname in it when missing, and
// returns its connection URL. An empty dataDir makes a temporary cluster
// that Stop removes.
func startEmbedded(ctx context.Context, dataDir string, port int, dbname string, settings map[string]string, log *slog.Logger) (*embedded, error) {
	srv, err := pglocal.Start(ctx, pglocal.Config{DataDir: dataDir, Port: port, Settings: settings, Logger: log})
	if err != nil {
		return nil, fmt.Errorf("start a private Postgres (give --db to use a server of your own instead): %w", err)
	}
	e := &embedded{srv: srv, url: srv.URL(dbname)}
	if dbname != "postgres" {
		if err := createDatabase(ctx, srv.URL("postgres"), dbname); err != nil {
			e.stop(log)
			return nil, err
		}
	}
	return e, nil
}

// createDatabase creates dbname unless it exists.
func createDatabase(ctx context.Context, adminURL, dbname string) error {
	conn, err := pgx.Connect(ctx, adminURL)
	if err != nil {
		return fmt.Errorf("connect to the private Postgres: %w", err)
	}
	defer conn.Close(context.WithoutCancel(ctx))
	var exists bool
	if err := conn.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM pg_database WHERE datname = $1)`, dbname).Scan(&exists); err != nil {
		return fmt.Errorf("look for database %q: %w", dbname, err)
	}
	if exists {
		return nil
	}
	_, err = conn.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{dbname}.Sanitize())
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) && pgErr.SQLState() == "42P04" {
		return nil // created by another process just now
	}
	if err != nil {
		return fmt.Errorf("create database %q: %w", dbname, err)
	}
	return nil
}

// psqlCommand is a psql command line that reaches database dbname of the
// private cluster over its unix socket.
func (e *embedded) psqlCommand(dbname string) string {
	return fmt.Sprintf("psql -h %s -p %d -U postgres %s", shellQuote(e.srv.SocketDir()), e.srv.Port(), dbname)
}

// stop shuts the cluster down if this process started it; a cluster that
// was already running, or was detached, is left alone.
func (e *embedded) stop(log *slog.Logger) {
	ctx, cancel := context.WithTimeout(context.Background(), embeddedStopTimeout)
	defer cancel()
	if err := e.srv.Stop(ctx); err != nil {
		log.Warn("stop the private Postgres", "data_dir", e.srv.DataDir(), "err", err)
	}
}

// shellQuote quotes s for a POSIX shell when it needs quoting.
func shellQuote(s string) string {
	safe := s != ""
	for _, r := range s {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '/' || r == '.' || r == '_' || r == '-' || r == ':' || r == '=') {
			safe = false
			break
		}
	}
	if safe {
		return s
	}
	out := "'"
	for _, r := range s {
		if r == '\'' {
			out += `'\''`
		} else {
			out += string(r)
		}
	}
	return out + "'"
}
