package main

import (
	"fmt"
	"log/slog"
	"time"

	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
	"github.com/sidetrend/sidetrend/sqlwire"
)

func runCommand() *cli.Command {
	return &cli.Command{
		Name:  "run",
		Usage: "run the sidecar: drain the change log and keep forecasts current",
		Description: "With no database configured (no --db, DATABASE_URL, SIDETREND_DB, PGHOST nor PGDATABASE),\n" +
			"run starts a private Postgres in --data-dir (or uses the one already running there),\n" +
			"prints its connection string, and runs against its database \"" + embeddedDB + "\".",
		Flags: append([]cli.Flag{
			dbFlag,
			&cli.BoolFlag{Name: "once", Usage: "drain everything pending, fold every due bucket, and exit", EnvVars: []string{"SIDETREND_ONCE"}},
			&cli.DurationFlag{Name: "poll", Value: 5 * time.Second, Usage: "fallback poll interval when no NOTIFY arrives", EnvVars: []string{"SIDETREND_POLL"}},
			&cli.IntFlag{Name: "workers", Value: pgsync.DefaultWorkers, Usage: "transactions that drain changes at once when more than a handful wait", EnvVars: []string{"SIDETREND_WORKERS"}},
			&cli.IntFlag{Name: "batch-size", Value: pgsync.DefaultBatchSize, Usage: "change rows one drain transaction claims at most", EnvVars: []string{"SIDETREND_BATCH_SIZE"}},
			&cli.DurationFlag{Name: "lock-timeout", Value: pgsync.DefaultLockTimeout, Usage: "longest wait for a lock on a tracked table (backfills; the table's writers are never blocked longer)", EnvVars: []string{"SIDETREND_LOCK_TIMEOUT"}},
			&cli.BoolFlag{Name: "migrate", Value: true, Usage: "apply pending migrations on start", EnvVars: []string{"SIDETREND_MIGRATE"}},
			&cli.StringFlag{Name: "http", Usage: "serve /metrics (Prometheus) and /healthz on this address, e.g. 127.0.0.1:9188; off when empty", EnvVars: []string{"SIDETREND_HTTP"}},
			&cli.StringFlag{Name: "data-dir", Value: "./.sidetrend/pg", Usage: "data directory of the private Postgres used when no database is configured", EnvVars: []string{"SIDETREND_DATA_DIR"}},
			&cli.StringFlag{Name: "sql-listen", Usage: "serve the live endpoint (Postgres wire protocol, for postgres_fdw) on this address, e.g. 127.0.0.1:5488; off when empty", EnvVars: []string{"SIDETREND_SQL_LISTEN"}},
			&cli.StringFlag{Name: "sql-users-file", Usage: "file of user:password lines for the live endpoint; without it SIDETREND_SQL_PASSWORD is the password of user sidetrend", EnvVars: []string{"SIDETREND_SQL_USERS_FILE"}},
			&cli.StringFlag{Name: "tls-cert", Usage: "TLS certificate (PEM) for the live endpoint", EnvVars: []string{"SIDETREND_TLS_CERT"}},
			&cli.StringFlag{Name: "tls-key", Usage: "TLS private key (PEM) for the live endpoint", EnvVars: []string{"SIDETREND_TLS_KEY"}},
			&cli.IntFlag{Name: "pg-port", Usage: "TCP port on 127.0.0.1 for that private Postgres; 0 picks a free one", EnvVars: []string{"SIDETREND_PG_PORT"}},
		}, liveLimitFlags()...),
		Action: func(c *cli.Context) error {
			log := newLogger(c)
			workers, batch := c.Int("workers"), c.Int("batch-size")
			if workers < 1 || workers > 64 {
				return fmt.Errorf("--workers %d is out of range: use 1 to 64 (the default %d suits a small machine)", workers, pgsync.DefaultWorkers)
			}
			if batch < 1 || batch > 100000 {
				return fmt.Errorf("--batch-size %d is out of range: use 1 to 100000 (default %d)", batch, pgsync.DefaultBatchSize)
			}
			db := c.String("db")
			if !databaseConfigured(c) {
				e, err := startEmbedded(c.Context, c.String("data-dir"), c.Int("pg-port"), embeddedDB, nil, log)
				if err != nil {
					return err
				}
				defer e.stop(log)
				db = e.url
				fmt.Fprintf(c.App.Writer, "no database configured: using the private Postgres in %s\n  connection string: %s\n  psql:              %s\n",
					e.srv.DataDir(), db, e.psqlCommand(embeddedDB))
			}
			if c.Bool("migrate") {
				if _, err := pgsync.Migrate(c.Context, db, log); err != nil {
					return err
				}
			}
			progress := newProgress(log)
			if c.Bool("once") {
				if c.String("http") != "" {
					log.Warn("--http is ignored with --once")
				}
				pool, err := pgsync.Connect(c.Context, db)
				if err != nil {
					return err
				}
				defer pool.Close()
				s := pgsync.NewSyncer(pool, log)
				s.Tune, s.DrainAll, s.Workers, s.BatchSize = true, true, workers, batch
				s.LockTimeout = c.Duration("lock-timeout")
				s.Progress = progress
				if err := s.CatchUp(c.Context); err != nil {
					return err
				}
				st := s.Stats()
				log.Info("caught up", "changes", st.Changes, "series", st.Series, "rebuilds", st.Rebuilds, "backfills", st.Backfills)
				return nil
			}
			poll := c.Duration("poll")
			if poll <= 0 {
				return fmt.Errorf("--poll %s is not a positive duration: use e.g. 5s", poll)
			}
			cfg := pgsync.RunnerConfig{Poll: poll, Progress: progress, Workers: workers, BatchSize: batch, LockTimeout: c.Duration("lock-timeout")}
			if addr := c.String("http"); addr != "" {
				pool, err := pgsync.Connect(c.Context, db)
				if err != nil {
					return err
				}
				defer pool.Close()
				m := newSidecarMetrics(poll, pool, log)
				cfg.OnBatch, cfg.OnCaughtUp, cfg.OnSessionError = m.onBatch, m.onCaughtUp, m.onSessionError
				srv, err := serveHTTP(addr, m.handler(), log)
				if err != nil {
					return err
				}
				defer srv.stop()
			}
			if addr := c.String("sql-listen"); addr != "" {
				stop, err := startLive(c, addr, db, log)
				if err != nil {
					return err
				}
				defer stop()
			}
			r := pgsync.NewRunner(db, cfg, log)
			if err := r.Start(c.Context); err != nil {
				return err
			}
			select {
			case <-c.Context.Done():
			case <-r.Done():
			}
			r.Stop()
			log.Info("stopped")
			return nil
		},
	}
}

// startLive starts the live endpoint that postgres_fdw attaches
// (sql/foreign.sql) and returns its stop function.
func startLive(c *cli.Context, addr, db string, log *slog.Logger) (func(), error) {
	creds, err := sqlwire.LoadCredentials(c.String("sql-users-file"))
	if err != nil {
		return nil, err
	}
	pool, err := pgsync.Connect(c.Context, db)
	if err != nil {
		return nil, err
	}
	cfg, err := liveConfig(c)
	if err != nil {
		pool.Close()
		return nil, err
	}
	cfg.Listen, cfg.Credentials = addr, creds
	srv := sqlwire.New(cfg, liveSource{pool: pool}, pool, log)
	if err := srv.Start(c.Context); err != nil {
		pool.Close()
		return nil, fmt.Errorf("live endpoint: %w", err)
	}
	log.Info("live endpoint listening", "addr", srv.Addr().String())
	return func() { srv.Stop(); pool.Close() }, nil
}
