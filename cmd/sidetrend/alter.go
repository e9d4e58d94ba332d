package main

import (
	"fmt"
	"strconv"
	"strings"

	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
)

func alterCommand() *cli.Command {
	return &cli.Command{
		Name:      "alter",
		Usage:     "change a tracker's horizon, model, lambda, burn-in, history, span, time zone, bucket width or transform, keeping its data",
		ArgsUsage: "NAME",
		Description: "Only the flags given change. A new model, lambda, burn-in or horizon is replayed from the stored\n" +
			"points; a new bucket width or time zone reads the source table again (and drops the forecast history,\n" +
			"whose bucket numbers no longer apply). The change commits in one transaction; the running sidecar\n" +
			"replays the series after it. In SQL: SELECT sidetrend.alter_tracker('NAME', horizon => 14, ...).",
		Flags: []cli.Flag{
			dbFlag,
			&cli.IntFlag{Name: "horizon", Usage: "buckets to forecast, 1 to 1000", EnvVars: []string{"SIDETREND_ALTER_HORIZON"}},
			&cli.IntFlag{Name: "degree", Usage: "polynomial trend degree, 0 to 3", EnvVars: []string{"SIDETREND_ALTER_DEGREE"}},
			&cli.Float64Flag{Name: "period", Usage: "seasonal period in buckets; 0 removes the season", EnvVars: []string{"SIDETREND_ALTER_PERIOD"}},
			&cli.IntFlag{Name: "harmonics", Usage: "harmonic pairs for the season, 1 to 6", EnvVars: []string{"SIDETREND_ALTER_HARMONICS"}},
			&cli.StringFlag{Name: "lambda", Usage: "forgetting factor in (0, 1], or auto to let the sidecar choose it", EnvVars: []string{"SIDETREND_ALTER_LAMBDA"}},
			&cli.IntFlag{Name: "burn-in", Usage: "points beyond the parameter count before estimates are served", EnvVars: []string{"SIDETREND_ALTER_BURN_IN"}},
			&cli.IntFlag{Name: "history", Usage: "buckets of served forecasts kept (0 keeps none)", EnvVars: []string{"SIDETREND_ALTER_HISTORY"}},
			&cli.StringFlag{Name: "span", Usage: "rows further than this from now are rejected, as a Postgres interval ('10 years')", EnvVars: []string{"SIDETREND_ALTER_SPAN"}},
			&cli.StringFlag{Name: "tz", Usage: "time zone the buckets follow (rereads the source)", EnvVars: []string{"SIDETREND_ALTER_TZ"}},
			&cli.StringFlag{Name: "bucket", Usage: "bucket width as a Postgres interval (rereads the source)", EnvVars: []string{"SIDETREND_ALTER_BUCKET"}},
			&cli.StringFlag{Name: "transform", Usage: "log or none: fit the logarithms of the values or the values (replays, and drops the forecast history of the old scale)", EnvVars: []string{"SIDETREND_ALTER_TRANSFORM"}},
		},
		Action: func(c *cli.Context) error {
			if c.NArg() != 1 {
				return fmt.Errorf("alter takes the tracker's name: sidetrend alter NAME --horizon 14 (see sidetrend alter --help)")
			}
			var o pgsync.AlterOptions
			num := func(name string) *int {
				if !c.IsSet(name) {
					return nil
				}
				v := c.Int(name)
				return &v
			}
			str := func(name string) *string {
				if !c.IsSet(name) {
					return nil
				}
				v := c.String(name)
				return &v
			}
			o.Horizon, o.Degree, o.Harmonics, o.BurnIn, o.History = num("horizon"), num("degree"), num("harmonics"), num("burn-in"), num("history")
			o.Span, o.TZ, o.Bucket, o.Transform = str("span"), str("tz"), str("bucket"), str("transform")
			if c.IsSet("period") {
				v := c.Float64("period")
				o.Period = &v
			}
			if c.IsSet("lambda") {
				switch l := strings.TrimSpace(c.String("lambda")); l {
				case "auto":
					o.LambdaAuto = true
				default:
					v, err := strconv.ParseFloat(l, 64)
					if err != nil {
						return fmt.Errorf("--lambda %q is not a number: use a forgetting factor such as 0.95, or auto", l)
					}
					o.Lambda = &v
				}
			}
			if o == (pgsync.AlterOptions{}) {
				return fmt.Errorf("nothing to change: give one of --horizon, --degree, --period, --harmonics, --lambda, --burn-in, --history, --span, --tz, --bucket, --transform")
			}
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			msg, err := pgsync.AlterTracker(c.Context, pool, c.Args().First(), o)
			if err != nil {
				return err
			}
			fmt.Fprintln(c.App.Writer, msg)
			return nil
		},
	}
}
