package pgsync

import (
	"context"
	"database/sql"
	"fmt"
	"log/slog"

	"github.com/jackc/pgx/v5/stdlib"
	"github.com/pressly/goose/v3"
	"github.com/pressly/goose/v3/lock"

	"github.com/sidetrend/sidetrend/migrations"
)

// migrationLockID is the advisory lock key (pg_advisory_lock) held while
// migrations run, so two processes migrating at once take turns. The value
// is "sdtrnd" in ASCII; any fixed key unlikely to clash would do.
const migrationLockID = 0x736474726e64

// Migrate applies every pending migration in order and reports how many ran.
// It is safe to run twice and from two processes at once: goose holds a
// session-level advisory lock for the whole run, and each file with its
// version row commits in one transaction.
func Migrate(ctx context.Context, dbURL string, log *slog.Logger) (int, error) {
	cfg, err := parseConfig(dbURL)
	if err != nil {
		return 0, err
	}
	db := stdlib.OpenDB(*cfg.ConnConfig)
	defer db.Close()
	db.SetMaxOpenConns(2)
	// The version table lives in schema sidetrend, which must exist before
	// goose creates its table there. Two processes may race on this
	// statement; IF NOT EXISTS is not atomic, so serialise it as well.
	if err := createSchema(ctx, db); err != nil {
		return 0, err
	}
	p, err := newMigrationProvider(db)
	if err != nil {
		return 0, err
	}
	res, err := p.Up(ctx)
	if err != nil {
		return len(res), fmt.Errorf("apply migrations: %w", err)
	}
	for _, r := range res {
		if log != nil {
			log.Info("migration applied", "version", r.Source.Version, "file", r.Source.Path, "took_ms", r.Duration.Milliseconds())
		}
	}
	return len(res), nil
}

func createSchema(ctx context.Context, db *sql.DB) error {
	conn, err := db.Conn(ctx)
	if err != nil {
		return fmt.Errorf("connect for migrations: %w", err)
	}
	defer conn.Close()
	if _, err := conn.ExecContext(ctx, `SELECT pg_advisory_lock($1)`, int64(migrationLockID+1)); err != nil {
		return fmt.Errorf("lock for schema creation: %w", err)
	}
	defer conn.ExecContext(context.WithoutCancel(ctx), `SELECT pg_advisory_unlock($1)`, int64(migrationLockID+1))
	if _, err := conn.ExecContext(ctx, `CREATE SCHEMA IF NOT EXISTS sidetrend`); err != nil {
		return fmt.Errorf("create schema sidetrend: %w", err)
	}
	return nil
}

// newMigrationProvider is the goose provider of sidetrend's migrations on
// db, serialised by a session advisory lock.
func newMigrationProvider(db *sql.DB) (*goose.Provider, error) {
	locker, err := lock.NewPostgresSessionLocker(lock.WithLockID(migrationLockID))
	if err != nil {
		return nil, err
	}
	p, err := goose.NewProvider(goose.DialectPostgres, db, migrations.FS,
		goose.WithTableName("sidetrend.schema_migrations"),
		goose.WithSessionLocker(locker),
		goose.WithDisableGlobalRegistry(true),
	)
	if err != nil {
		return nil, fmt.Errorf("load migrations: %w", err)
	}
	return p, nil
}
