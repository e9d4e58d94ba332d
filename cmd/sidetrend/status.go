package main

import (
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
)

func statusCommand() *cli.Command {
	return &cli.Command{
		Name:  "status",
		Usage: "show trackers, series counts, lag, rejects and the newest errors",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "format", Value: "table", Usage: "table (aligned text) or json"},
		},
		Action: func(c *cli.Context) error {
			format := c.String("format")
			if format != "table" && format != "json" {
				return fmt.Errorf("--format %q is not known: use table or json", format)
			}
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			st, err := pgsync.LoadStatus(c.Context, pool)
			if err != nil {
				return err
			}
			if format == "json" {
				enc := json.NewEncoder(c.App.Writer)
				enc.SetIndent("", "  ")
				return enc.Encode(st)
			}
			return writeStatusTable(c.App.Writer, st)
		},
	}
}

// writeStatusTable prints the status for people: a summary line, one row
// per tracker, then the errors, each on its own line so that long messages
// do not stretch the table.
func writeStatusTable(w io.Writer, st *pgsync.Status) error {
	fmt.Fprintf(w, "%d trackers, %d series (%d ready, %d warming), %d pending changes (oldest %s), %d rejects\n\n",
		len(st.Trackers), st.Series, st.ReadySeries, st.WarmingSeries, st.PendingChanges, seconds(st.LagSeconds), st.Rejects)
	if len(st.Trackers) == 0 {
		fmt.Fprintln(w, "No trackers yet: register a table with `sidetrend track` or SELECT sidetrend.track(...).")
		return nil
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "tracker\tsource\tbucket\tmodel\tstatus\tbackfilled\tready\twarming\treplay\tpending\tlag\trejects")
	for _, t := range st.Trackers {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%d\t%d\t%d\t%d\t%s\t%d\n",
			t.Name, t.Source, t.Bucket, t.Model, t.Status, yesNo(t.Backfilled),
			t.Ready, t.Warming, t.Rebuilding, t.PendingChanges, seconds(t.LagSeconds), t.Rejects)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	var errs []string
	for _, t := range st.Trackers {
		if t.LastError != nil {
			errs = append(errs, fmt.Sprintf("  %s: %s", t.Name, oneLine(*t.LastError)))
		}
		if e := t.LastSeriesError; e != nil {
			when := ""
			if e.At != nil {
				when = " (" + e.At.UTC().Format(time.DateTime) + " UTC)"
			}
			errs = append(errs, fmt.Sprintf("  %s, series %q%s: %s (%d series with an error)",
				t.Name, e.SeriesKey, when, oneLine(e.Error), t.WithError))
		}
	}
	if len(errs) > 0 {
		fmt.Fprintln(w, "\nLast errors:")
		fmt.Fprintln(w, strings.Join(errs, "\n"))
	}
	return nil
}

func yesNo(b bool) string {
	if b {
		return "yes"
	}
	return "no"
}

// seconds formats a lag: "-" for none, else a rounded duration.
func seconds(s float64) string {
	if s <= 0 {
		return "-"
	}
	d := time.Duration(s * float64(time.Second))
	switch {
	case d < time.Second:
		return strconv.FormatInt(d.Milliseconds(), 10) + "ms"
	case d < time.Minute:
		return d.Round(100 * time.Millisecond).String()
	default:
		return d.Round(time.Second).String()
	}
}

// oneLine folds a message onto one line.
func oneLine(s string) string {
	return strings.Join(strings.Fields(s), " ")
}
