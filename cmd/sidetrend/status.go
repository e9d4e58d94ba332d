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
		Usage: "show trackers, series counts, lag, rejects and the series in error",
		Description: "Shows every tracker with its counts and errors, then the series whose last fold had an error\n" +
			"(at most --limit). With --series it lists the series themselves: key, state, points, newest folded\n" +
			"bucket and error, of every tracker or of --tracker.",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "format", Value: "table", Usage: "table (aligned text) or json", EnvVars: []string{"SIDETREND_STATUS_FORMAT"}},
			&cli.BoolFlag{Name: "series", Usage: "list the series (key, state, points, newest folded bucket, error)", EnvVars: []string{"SIDETREND_STATUS_SERIES"}},
			&cli.StringFlag{Name: "tracker", Usage: "only the series of this tracker (with --series)", EnvVars: []string{"SIDETREND_STATUS_TRACKER"}},
			&cli.IntFlag{Name: "limit", Value: 100, Usage: "list at most this many series", EnvVars: []string{"SIDETREND_STATUS_LIMIT"}},
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
			limit := c.Int("limit")
			if limit < 1 {
				return fmt.Errorf("--limit %d lists nothing: use 1 or more", limit)
			}
			if c.String("tracker") != "" && !c.Bool("series") {
				return fmt.Errorf("--tracker picks the series to list: add --series")
			}
			st, err := pgsync.LoadStatus(c.Context, pool)
			if err != nil {
				return err
			}
			if c.Bool("series") {
				if name := c.String("tracker"); name != "" && !hasTracker(st, name) {
					return fmt.Errorf("no tracker named %q: see the trackers `sidetrend status` lists", name)
				}
				list, more, err := pgsync.SeriesStatus(c.Context, pool, c.String("tracker"), false, limit)
				if err != nil {
					return err
				}
				if format == "json" {
					return writeJSON(c.App.Writer, map[string]any{"series": list, "more": more})
				}
				return writeSeriesTable(c.App.Writer, list, more, limit)
			}
			errs, more, err := pgsync.SeriesStatus(c.Context, pool, "", true, limit)
			if err != nil {
				return err
			}
			if format == "json" {
				return writeJSON(c.App.Writer, struct {
					*pgsync.Status
					SeriesErrors []pgsync.SeriesInfo `json:"series_errors"`
					More         bool                `json:"series_errors_more"`
				}{st, errs, more})
			}
			if err := writeStatusTable(c.App.Writer, st); err != nil {
				return err
			}
			if len(errs) > 0 {
				fmt.Fprintln(c.App.Writer, "\nSeries in error:")
				return writeSeriesTable(c.App.Writer, errs, more, limit)
			}
			return nil
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
	fmt.Fprintln(tw, "tracker\tsource\tbucket\tmodel\tstatus\tbackfilled\tready\twarming\treplay\tfailed\tpending\tlag\trejects")
	for _, t := range st.Trackers {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%d\t%d\t%d\t%d\t%d\t%s\t%d\n",
			t.Name, t.Source, t.Bucket, t.Model, t.Status, yesNo(t.Backfilled),
			t.Ready, t.Warming, t.Rebuilding, t.Failed, t.PendingChanges, seconds(t.LagSeconds), t.Rejects)
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

func hasTracker(st *pgsync.Status, name string) bool {
	for _, t := range st.Trackers {
		if t.Name == name {
			return true
		}
	}
	return false
}

func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

// writeSeriesTable prints series one a line: tracker, key, state, points,
// newest folded bucket, and the error with its time.
func writeSeriesTable(w io.Writer, list []pgsync.SeriesInfo, more bool, limit int) error {
	if len(list) == 0 {
		fmt.Fprintln(w, "No series.")
		return nil
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "tracker\tseries_key\tstate\tpoints\tfolded_through\terror")
	for _, s := range list {
		through, msg := "-", ""
		if s.Through != nil {
			through = s.Through.UTC().Format(time.DateTime)
		}
		if s.LastError != nil {
			msg = oneLine(*s.LastError)
			if s.ErrorAt != nil {
				msg = s.ErrorAt.UTC().Format(time.DateTime) + " UTC: " + msg
			}
		}
		fmt.Fprintf(tw, "%s\t%q\t%s\t%d\t%s\t%s\n", s.Tracker, s.Key, s.State, s.Points, through, msg)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if more {
		fmt.Fprintf(w, "(only the first %d: raise --limit, or pick one tracker with --series --tracker NAME)\n", limit)
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
