package main

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"text/tabwriter"

	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
)

func tuneCommand() *cli.Command {
	return &cli.Command{
		Name:  "tune",
		Usage: "choose the forgetting factors from one-step errors on buckets each forecast had not seen, and compare degrees and harmonics",
		UsageText: "sidetrend tune [--tracker NAME] [--per-series] [--apply [--model]]\n\n" +
			"Without --apply nothing changes but the stored results sidetrend.tune() reads.",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "tracker", Usage: "tracker to tune (default: every active tracker)"},
			&cli.BoolFlag{Name: "per-series", Usage: "also choose a lambda for each series on its own"},
			&cli.BoolFlag{Name: "apply", Usage: "store the chosen lambda (per series with --per-series) and replay the series"},
			&cli.BoolFlag{Name: "model", Usage: "with --apply: also switch degree and harmonics to the model with the smallest errors"},
			&cli.BoolFlag{Name: "replay", Value: true, Usage: "with --apply: replay the series before returning (else the running sidecar does)"},
		},
		Action: func(c *cli.Context) error {
			if c.Bool("model") && !c.Bool("apply") {
				return fmt.Errorf("--model switches the model only together with --apply; without it the comparison is always shown")
			}
			log := newLogger(c)
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			res, err := pgsync.Tune(c.Context, pool, pgsync.TuneOptions{
				Tracker: c.String("tracker"), PerSeries: c.Bool("per-series"),
				Apply: c.Bool("apply"), Model: c.Bool("model"), Progress: newProgress(log),
			})
			if err != nil {
				return err
			}
			if len(res) == 0 {
				fmt.Fprintln(c.App.Writer, "no active tracker to tune")
				return nil
			}
			printTune(c.App.Writer, res)
			applied := false
			for _, r := range res {
				applied = applied || r.Applied
			}
			switch {
			case applied && c.Bool("replay"):
				s := pgsync.NewSyncer(pool, log)
				s.Progress = newProgress(log)
				if err := s.CatchUp(c.Context); err != nil {
					return fmt.Errorf("replay after tuning: %w", err)
				}
				fmt.Fprintf(c.App.Writer, "applied; %d series replayed with the new settings\n", s.Stats().Rebuilds)
			case applied:
				fmt.Fprintln(c.App.Writer, "applied; the sidecar replays the series (or run `sidetrend run --once`)")
			default:
				fmt.Fprintln(c.App.Writer, "nothing changed: add --apply to use these lambdas")
			}
			return nil
		},
	}
}

// printTune writes one table of lambdas and, per tracker, the model
// comparison.
func printTune(w io.Writer, res []pgsync.TuneResult) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "tracker\tseries\tlambda now\tseason now\tlambda\tseason\tmemory (buckets)\trmse now\trmse tuned\terrors\tapplied\t")
	for _, r := range res {
		key := fmt.Sprintf("(all %d)", r.Series)
		if r.SeriesKey != nil {
			key = *r.SeriesKey
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%d\t%s\t\n", r.Tracker, key, tuneNum(r.LambdaBefore, 4),
			seasonNum(r.SeasonLambdaBefore), tuneNum(r.Lambda, 4), seasonNum(r.SeasonLambda),
			tuneNum(r.MemoryBuckets, 1), tuneNum(r.RMSEBefore, 4), tuneNum(r.RMSEAfter, 4), r.N, tuneYesNo(r.Applied))
	}
	tw.Flush()
	fmt.Fprintln(w, "rmse now and rmse tuned: one-step errors over the same buckets (each series' first buckets, the warm-up, left out), every forecast made from the buckets before it only; season: the seasonal factor (= : the same as lambda)")
	for _, r := range res {
		for _, b := range r.AtBound {
			key := ""
			if r.SeriesKey != nil {
				key = " series " + strconv.Quote(*r.SeriesKey)
			}
			fmt.Fprintf(w, "%s%s: %s; the best setting may lie beyond it\n", r.Tracker, key, b)
		}
	}
	for _, r := range res {
		if r.SeriesKey != nil {
			continue
		}
		if r.Note != "" {
			fmt.Fprintf(w, "%s: %s\n", r.Tracker, r.Note)
		}
		if len(r.Models) == 0 {
			continue
		}
		fmt.Fprintf(w, "\nmodels for %s, each at its own best factors, on the same %d one-step errors:\n", r.Tracker, r.Models[0].N)
		mw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(mw, "\tdegree\tperiod\tharmonics\tlambda\tseason\trmse\t\t")
		for i, m := range r.Models {
			mark, note := " ", ""
			if i == r.Best {
				mark = "*"
			}
			if m.Current {
				note = "current degree and harmonics (rmse tuned)"
			}
			if m.Current && r.ModelSwitched {
				note = "was current"
			}
			if i == r.Best && r.ModelSwitched {
				note = "now in use"
			}
			fmt.Fprintf(mw, "%s\t%d\t%s\t%d\t%s\t%s\t%s\t%s\t\n", mark, m.Degree, tuneNum(m.Period, 2), m.Harmonics, tuneNum(m.Lambda, 4),
				seasonNum(m.SeasonLambda), tuneNum(m.RMSE, 4), note)
		}
		mw.Flush()
		if r.Best >= 0 && !r.Models[r.Best].Current && !r.ModelSwitched {
			fmt.Fprintf(w, "the starred model has smaller one-step errors; `sidetrend tune --tracker %s --apply --model` switches to it\n", r.Tracker)
		}
	}
}

func tuneNum(x float64, prec int) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return "-"
	}
	return strconv.FormatFloat(x, 'f', prec, 64)
}

// seasonNum prints a seasonal factor; 0 is "the same as lambda".
func seasonNum(x float64) string {
	if x == 0 {
		return "="
	}
	return tuneNum(x, 4)
}

func tuneYesNo(b bool) string {
	if b {
		return "yes"
	}
	return "no"
}
