package main

import (
	"time"

	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
)

func runCommand() *cli.Command {
	return &cli.Command{
		Name:  "run",
		Usage: "run the sidecar: drain the change log and keep forecasts current",
		Flags: []cli.Flag{
			dbFlag,
			&cli.BoolFlag{Name: "once", Usage: "drain everything pending, fold every due bucket, and exit", EnvVars: []string{"SIDETREND_ONCE"}},
			&cli.DurationFlag{Name: "poll", Value: 5 * time.Second, Usage: "fallback poll interval when no NOTIFY arrives", EnvVars: []string{"SIDETREND_POLL"}},
			&cli.BoolFlag{Name: "migrate", Value: true, Usage: "apply pending migrations on start", EnvVars: []string{"SIDETREND_MIGRATE"}},
		},
		Action: func(c *cli.Context) error {
			log := newLogger(c)
			db := c.String("db")
			if c.Bool("migrate") {
				if _, err := pgsync.Migrate(c.Context, db, log); err != nil {
					return err
				}
			}
			if c.Bool("once") {
				pool, err := pgsync.Connect(c.Context, db)
				if err != nil {
					return err
				}
				defer pool.Close()
				s := pgsync.NewSyncer(pool, log)
				if err := s.CatchUp(c.Context); err != nil {
					return err
				}
				st := s.Stats()
				log.Info("caught up", "changes", st.Changes, "series", st.Series, "rebuilds", st.Rebuilds, "backfills", st.Backfills)
				return nil
			}
			r := pgsync.NewRunner(db, pgsync.RunnerConfig{Poll: c.Duration("poll")}, log)
			if err := r.Start(c.Context); err != nil {
				return err
			}
			<-c.Context.Done()
			r.Stop()
			log.Info("stopped")
			return nil
		},
	}
}
