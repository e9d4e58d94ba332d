package main

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/urfave/cli/v2"
)

// backtestColumns are the columns of the csv and json output (contract).
var backtestColumns = []string{"series_key", "horizon", "n_errors", "rmse", "mae", "coverage80", "coverage95", "model"}

func backtestCommand() *cli.Command {
	return &cli.Command{
		Name:  "backtest",
		Usage: "score forecasts of the series in a CSV file on held-out buckets, without a database",
		UsageText: "sidetrend backtest --csv sales.csv --time-col day --value-col amount --period 7 --holdout 0.25\n" +
			"sidetrend backtest --csv meters.csv --bucket '1 hour' --agg mean --period 24 --holdout 168 --horizon 24 --format csv",
		Description: "Reads the CSV file as `sidetrend forecast` does and holds out the last --holdout buckets of each\n" +
			"series (a number of buckets, or a fraction of each series' buckets when below 1). The model\n" +
			"settings given as flags are fixed; those left out (degree, harmonics, the forgetting factors) are\n" +
			"chosen on the buckets before the holdout only, by one-step error over a rolling origin. Then the\n" +
			"state runs over the whole series with the model fixed, and every forecast 1..--horizon buckets\n" +
			"ahead whose target lies in the holdout is scored: RMSE, MAE and the share of actuals inside the\n" +
			"80 % and 95 % intervals. A first or last bucket that the rows cover only in part is left out.",
		Flags: append([]cli.Flag{
			&cli.StringFlag{Name: "csv", Required: true, Usage: "CSV file with a header row; - reads standard input"},
			&cli.StringFlag{Name: "time-col", Value: "time", Usage: "name of the time column"},
			&cli.StringFlag{Name: "value-col", Value: "value", Usage: "name of the value column (not needed for --agg count)"},
			&cli.StringFlag{Name: "key-col", Value: "key", Usage: "name of the key column; without it in the file, all rows are one series"},
			&cli.StringFlag{Name: "tz", Value: "UTC", Usage: "time zone the buckets follow, and of times written without an offset"},
			&cli.StringFlag{Name: "bucket", Value: "1 day", Usage: "bucket width as a Postgres interval ('15 minutes', '1 day', '1 month')"},
			&cli.StringFlag{Name: "agg", Value: "sum", Usage: "aggregate per bucket: sum, mean, min, max, last, count"},
			&cli.StringFlag{Name: "empty", Usage: "an empty bucket between two observed ones: zero or gap (default zero for sum and count, gap otherwise)"},
			&cli.IntFlag{Name: "degree", Usage: "polynomial trend degree, 0 to 3; left out, chosen from 0 to 2"},
			&cli.StringFlag{Name: "holdout", Required: true, Usage: "buckets held out at the end of each series: a whole number >= 1, or a fraction 0 < H < 1 of its buckets"},
			&cli.IntFlag{Name: "horizon", Value: 1, Usage: "score forecasts 1 to this many buckets ahead"},
			&cli.StringFlag{Name: "format", Value: "table", Usage: "output: table (for reading), csv or json"},
		}, modelCLIFlags()...),
		Action: func(c *cli.Context) error {
			o, err := forecastOptionsFrom(c)
			if err != nil {
				return err
			}
			hold, frac, err := parseHoldout(c.String("holdout"))
			if err != nil {
				return err
			}
			series, err := readCSVFlag(c, o)
			if err != nil {
				return err
			}
			var rows []backtestRow
			for _, s := range series {
				ys, _, _, err := seriesValues(s, o, c.App.ErrWriter)
				if err != nil {
					return err
				}
				n := hold
				if frac > 0 {
					n = int(math.Round(frac * float64(len(ys))))
				}
				from := len(ys) - n
				if n < 1 || from < 1 {
					fmt.Fprintf(c.App.ErrWriter, "series %s: %d buckets leave nothing to hold out %s from; left out\n",
						displayKey(s.key), len(ys), c.String("holdout"))
					continue
				}
				spec, ch, err := o.model.choose(ys[:from])
				if err == estimator.ErrNoErrors {
					fmt.Fprintf(c.App.ErrWriter, "series %s: the %d buckets before the holdout are too few to choose a model; left out\n",
						displayKey(s.key), from)
					continue
				}
				if err != nil {
					return fmt.Errorf("series %s: choose the model: %w", displayKey(s.key), err)
				}
				if ch != nil {
					for _, b := range ch.AtBound {
						fmt.Fprintf(c.App.ErrWriter, "series %s: %s: the best setting may lie beyond it\n", displayKey(s.key), b)
					}
				}
				scores, err := aheadScores(spec, ys, from, o)
				if err != nil {
					return fmt.Errorf("series %s: %w", displayKey(s.key), err)
				}
				for _, sc := range scores {
					rows = append(rows, backtestRow{SeriesKey: s.key, Horizon: sc.Horizon, NErrors: sc.N,
						RMSE: num(sc.RMSE), MAE: num(sc.MAE), Coverage80: num(sc.Cov80), Coverage95: num(sc.Cov95),
						Model: o.model.modelText(spec)})
				}
			}
			return writeBacktest(c.App.Writer, o.format, rows)
		},
	}
}

// parseHoldout reads --holdout: a whole number of buckets >= 1, or a
// fraction in (0, 1).
func parseHoldout(s string) (n int, frac float64, err error) {
	v, perr := strconv.ParseFloat(strings.TrimSpace(s), 64)
	switch {
	case perr != nil || math.IsNaN(v) || v <= 0:
		return 0, 0, fmt.Errorf("--holdout %q is not a holdout: give a whole number of buckets (12) or a fraction of each series (0.25)", s)
	case v < 1:
		return 0, v, nil
	case v != math.Trunc(v) || v > math.MaxInt32:
		return 0, 0, fmt.Errorf("--holdout %s: a number of buckets must be whole (or a fraction below 1)", s)
	}
	return int(v), 0, nil
}

// aheadScores scores spec over ys from bucket from on, on the data's scale:
// with --transform log the forecasts and bounds are transformed back before
// they are compared with the actuals.
func aheadScores(spec estimator.Spec, ys []float64, from int, o forecastOptions) ([]estimator.AheadScore, error) {
	if o.model.transform == "" {
		out, _, err := estimator.Ahead(spec, ys, from, o.horizon)
		return out, err
	}
	return estimator.AheadMapped(spec, ys, from, o.horizon, o.model.back)
}

// backtestRow is one output row, in the contract's column order; nil is a
// value that is not defined (no errors, or no interval).
type backtestRow struct {
	SeriesKey  string   `json:"series_key"`
	Horizon    int      `json:"horizon"`
	NErrors    int64    `json:"n_errors"`
	RMSE       *float64 `json:"rmse"`
	MAE        *float64 `json:"mae"`
	Coverage80 *float64 `json:"coverage80"`
	Coverage95 *float64 `json:"coverage95"`
	Model      string   `json:"model"`
}

func num(x float64) *float64 { return bound(x) }

func writeBacktest(w io.Writer, format string, rows []backtestRow) error {
	text := func(x *float64, f byte, prec int) string {
		if x == nil {
			return ""
		}
		return strconv.FormatFloat(*x, f, prec, 64)
	}
	switch format {
	case "json":
		if rows == nil {
			rows = []backtestRow{}
		}
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(rows)
	case "csv":
		cw := csv.NewWriter(w)
		if err := cw.Write(backtestColumns); err != nil {
			return err
		}
		for _, r := range rows {
			if err := cw.Write([]string{r.SeriesKey, strconv.Itoa(r.Horizon), strconv.FormatInt(r.NErrors, 10),
				text(r.RMSE, 'g', -1), text(r.MAE, 'g', -1), text(r.Coverage80, 'g', -1), text(r.Coverage95, 'g', -1), r.Model}); err != nil {
				return err
			}
		}
		cw.Flush()
		return cw.Error()
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, strings.Join(backtestColumns, "\t"))
	for _, r := range rows {
		dash := func(s string) string {
			if s == "" {
				return "-"
			}
			return s
		}
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%s\t%s\n", displayKey(r.SeriesKey), r.Horizon, r.NErrors,
			dash(text(r.RMSE, 'g', 5)), dash(text(r.MAE, 'g', 5)), dash(text(r.Coverage80, 'f', 3)), dash(text(r.Coverage95, 'f', 3)), r.Model)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if len(rows) == 0 {
		fmt.Fprintln(w, "no series has enough buckets for a backtest")
	}
	return nil
}
