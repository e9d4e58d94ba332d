package main

import (
	"fmt"
	"log/slog"
	"os"

	"github.com/urfave/cli/v2"
	"golang.org/x/term"

	"github.com/sidetrend/sidetrend/pgsync"
)

var dbFlag = &cli.StringFlag{
	Name:    "db",
	Usage:   "Postgres connection string; empty means the PG* environment variables",
	EnvVars: []string{"DATABASE_URL", "SIDETREND_DB"},
}

// newLogger logs text on a terminal and JSON otherwise.
func newLogger(c *cli.Context) *slog.Logger {
	level := slog.LevelInfo
	if c.Bool("verbose") {
		level = slog.LevelDebug
	}
	opts := &slog.HandlerOptions{Level: level}
	if term.IsTerminal(int(os.Stderr.Fd())) {
		return slog.New(slog.NewTextHandler(os.Stderr, opts))
	}
	return slog.New(slog.NewJSONHandler(os.Stderr, opts))
}

func migrateCommand() *cli.Command {
	return &cli.Command{
		Name:  "migrate",
		Usage: "create or upgrade the sidetrend schema (safe to run twice, and from two processes at once)",
		Flags: []cli.Flag{dbFlag},
		Action: func(c *cli.Context) error {
			n, err := pgsync.Migrate(c.Context, c.String("db"), newLogger(c))
			if err != nil {
				return err
			}
			fmt.Fprintf(c.App.Writer, "%d migrations applied; schema sidetrend is current\n", n)
			return nil
		},
	}
}

func trackCommand() *cli.Command {
	return &cli.Command{
		Name:      "track",
		Usage:     "register a table to keep forecasts for (calls sidetrend.track)",
		UsageText: "sidetrend track --table public.sales --time sold_at --value amount --key shop --bucket '1 day' --period 7 --harmonics 2",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "table", Required: true, Usage: "source table, optionally schema-qualified"},
			&cli.StringFlag{Name: "time", Required: true, Usage: "time column (date, timestamp or timestamptz)"},
			&cli.StringFlag{Name: "value", Usage: "numeric value column (not needed with --agg count)"},
			&cli.StringSliceFlag{Name: "key", Usage: "key column naming a series; repeat for several"},
			&cli.StringFlag{Name: "bucket", Value: "1 day", Usage: "bucket width as a Postgres interval ('15 minutes', '1 day', '1 month')"},
			&cli.StringFlag{Name: "agg", Value: "sum", Usage: "aggregate per bucket: sum, mean, min, max, last, count"},
			&cli.IntFlag{Name: "degree", Value: 1, Usage: "polynomial trend degree, 0 to 3"},
			&cli.Float64Flag{Name: "period", Usage: "seasonal period in buckets (7 for weekly in days); 0 for none"},
			&cli.IntFlag{Name: "harmonics", Usage: "harmonic pairs for the season, 1 to 6"},
			&cli.StringFlag{Name: "lambda", Value: "0.95", Usage: "forgetting factor in (0, 1], or 'auto' to tune after the backfill"},
			&cli.IntFlag{Name: "horizon", Value: 12, Usage: "buckets to forecast"},
			&cli.StringFlag{Name: "name", Usage: "tracker name (default: the table's name)"},
			&cli.StringFlag{Name: "empty", Usage: "an empty bucket between two observed ones: zero or gap (default zero for sum and count)"},
			&cli.StringFlag{Name: "tz", Value: "UTC", Usage: "time zone the buckets follow"},
			&cli.IntFlag{Name: "burn-in", Usage: "points beyond the parameter count before estimates are served"},
			&cli.StringFlag{Name: "transform", Usage: "log: fit the logarithms of the bucket values (for a season that swings with the level; buckets that are not positive are skipped); forecasts and bounds are transformed back"},
		},
		Action: func(c *cli.Context) error {
			o := pgsync.TrackOptions{Table: c.String("table"), Time: c.String("time"), Value: c.String("value")}
			if keys := c.StringSlice("key"); len(keys) > 0 {
				o.Keys = keys
			}
			str := func(name string) *string {
				if !c.IsSet(name) && c.String(name) == "" {
					return nil
				}
				v := c.String(name)
				return &v
			}
			num := func(name string) *int {
				v := c.Int(name)
				return &v
			}
			o.Bucket, o.Agg, o.TZ = str("bucket"), str("agg"), str("tz")
			o.Name, o.Empty, o.Transform = str("name"), str("empty"), str("transform")
			o.Degree, o.Horizon, o.BurnIn = num("degree"), num("horizon"), num("burn-in")
			if c.IsSet("period") && c.Float64("period") > 0 {
				v := c.Float64("period")
				o.Period = &v
			}
			o.Harmonics = num("harmonics")
			switch l := c.String("lambda"); l {
			case "auto":
				o.LambdaSet = true
			default:
				var v float64
				if _, err := fmt.Sscan(l, &v); err != nil {
					return fmt.Errorf("--lambda %q is not a number: use a forgetting factor such as 0.95, or auto", l)
				}
				o.Lambda = &v
			}
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			id, err := pgsync.Track(c.Context, pool, o)
			if err != nil {
				return err
			}
			fmt.Fprintf(c.App.Writer, "tracker %d created on %s; `sidetrend run` takes in its existing rows\n", id, o.Table)
			return nil
		},
	}
}

// count writes n and the noun in the number n calls for.
func count(n int64, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return fmt.Sprintf("%d %s", n, many)
}

func untrackCommand() *cli.Command {
	return &cli.Command{
		Name:      "untrack",
		Usage:     "remove a tracker, its triggers and its series (the source table is left alone)",
		ArgsUsage: "NAME",
		Flags:     []cli.Flag{dbFlag},
		Action: func(c *cli.Context) error {
			if c.NArg() != 1 {
				return fmt.Errorf("untrack takes the tracker's name: sidetrend untrack NAME")
			}
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			name := c.Args().First()
			r, err := pgsync.Untrack(c.Context, pool, name)
			if err != nil {
				return err
			}
			fmt.Fprintf(c.App.Writer, "untracked %s: removed its capture triggers, %s, %s, %s, %s and %s; %s itself is unchanged\n",
				name, count(r.Series, "series", "series"), count(r.Points, "bucket point", "bucket points"),
				count(r.Changes, "pending change", "pending changes"), count(r.Rejects, "reject", "rejects"),
				count(r.Forecasts, "served forecast", "served forecasts"), r.Source)
			return nil
		},
	}
}

func rebuildCommand() *cli.Command {
	return &cli.Command{
		Name:  "rebuild",
		Usage: "reread trackers or single series from their source tables (after changes made with triggers disabled)",
		UsageText: "sidetrend rebuild [--tracker NAME [--series KEY]]\n" +
			"   in SQL: SELECT sidetrend.rebuild('NAME'[, 'KEY']) queues the same for the running sidecar",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "tracker", Usage: "tracker name (default: every tracker)"},
			&cli.StringFlag{Name: "series", Usage: "one series key of the tracker"},
		},
		Action: func(c *cli.Context) error {
			if c.IsSet("series") && !c.IsSet("tracker") {
				return fmt.Errorf("--series needs --tracker: say which tracker the series %q belongs to", c.String("series"))
			}
			log := newLogger(c)
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			var names []string
			if c.IsSet("tracker") {
				names = []string{c.String("tracker")}
			} else {
				ts, err := pgsync.LoadTrackers(c.Context, pool)
				if err != nil {
					return err
				}
				for _, t := range ts {
					if t.Status == "active" {
						names = append(names, t.Name)
					}
				}
			}
			for _, name := range names {
				var key any
				if c.IsSet("series") {
					key = c.String("series")
				}
				if _, err := pool.Exec(c.Context, `SELECT sidetrend.rebuild($1, $2)`, name, key); err != nil {
					return fmt.Errorf("rebuild %s: %w", name, err)
				}
			}
			s := pgsync.NewSyncer(pool, log)
			s.Tune = true
			if err := s.CatchUp(c.Context); err != nil {
				return err
			}
			st := s.Stats()
			what := count(int64(len(names)), "tracker", "trackers") + " queued for a reread from the source"
			if c.IsSet("series") {
				what = fmt.Sprintf("series %q of tracker %s queued for a reread from the source", c.String("series"), names[0])
			}
			if c.IsSet("series") {
				fmt.Fprintf(c.App.Writer, "%s; this run replayed %s", what, count(st.Rebuilds, "series", "series"))
			} else {
				fmt.Fprintf(c.App.Writer, "%s; this run reread %s and replayed %s", what,
					count(st.Backfills, "tracker", "trackers"), count(st.Rebuilds, "series", "series"))
				if st.Backfills < int64(len(names)) {
					fmt.Fprint(c.App.Writer, " (a running sidecar took the rest)")
				}
			}
			fmt.Fprintln(c.App.Writer)
			return nil
		},
	}
}
