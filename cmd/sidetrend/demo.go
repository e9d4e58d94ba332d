package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/pgsync"
)

// The demo is set in a chain of five bicycle-repair workshops, "Spokes &
// Sprockets", invented for it: every finished repair job is a row with the
// day and the amount paid; the owners watch daily takings per workshop and
// compare each month with its budget.

// demoSchema holds the demo's own tables; sidetrend's objects stay in
// schema sidetrend.
const demoSchema = "sidetrend_demo"

// demoTracker is the tracker the demo registers.
const demoTracker = "demo_takings"

// demoFocus is the workshop whose forecast the demo prints and draws.
const demoFocus = "brindlecombe"

// demoFirstDay and demoHistoryDays: the history loaded before tracking is
// demoHistoryDays days from demoFirstDay, and the live days follow, so that
// the newest day is yesterday (UTC): the README's now()-based recipes ("next
// month", "rest of this month") return the rows they promise. runDemo sets
// demoFirstDay (demoStart).
var demoFirstDay = demoStart(time.Now(), 0)

const demoHistoryDays = 377

// demoMaxLiveDays caps the live days.
const demoMaxLiveDays = 15

// demoStart is the first day of the history when liveDays live days follow
// it and the newest of them is the day before now (UTC).
func demoStart(now time.Time, liveDays int) time.Time {
	yesterday := time.Date(now.Year(), now.Month(), now.Day(), 0, 0, 0, 0, time.UTC).AddDate(0, 0, -1)
	return yesterday.AddDate(0, 0, -(demoHistoryDays + liveDays - 1))
}

// demoLiveDays is how many live days the options give.
func demoLiveDays(o demoOptions) int {
	return max(0, min(int(o.live/o.every), demoMaxLiveDays))
}

// demoWaitTimeout bounds each wait for the sidecar.
const demoWaitTimeout = 30 * time.Second

type demoBranch struct {
	key   string
	town  string
	base  float64 // expected takings on an average weekday at the start, in euros
	trend float64 // euros per day the average changes by
	plan  float64 // euros per day the budget assumed it would change by
}

// demoBranches are the five workshops. The trends differ so that the slope
// table shows growth, decline and flat; the plans differ from them so that
// some months beat their budget and some miss it.
var demoBranches = []demoBranch{
	{key: "ashmere", town: "Ashmere", base: 1400, trend: 1.6, plan: 1.0},
	{key: "brindlecombe", town: "Brindlecombe", base: 1180, trend: 0.7, plan: 0.8},
	{key: "corrowick", town: "Corrowick", base: 1150, trend: -1.0, plan: -0.6},
	{key: "dunmarsh", town: "Dunmarsh", base: 1320, trend: 0.0, plan: 0.3},
	{key: "elverton", town: "Elverton", base: 760, trend: 1.2, plan: 1.24},
}

// demoWeekly is the weekly cycle of takings on weekday d (time.Weekday,
// Sunday = 0), two harmonics as the tracker models it, w = 2 pi / 7:
//
//	1 - 0.06 cos(w d) - 0.24 sin(w d) - 0.15 cos(2 w d) - 0.16 sin(2 w d)
//
// a slow Monday (0.65), busy Friday and Saturday (1.32, 1.34); the factors
// average 1. (The coefficients are the least-squares projection of a
// hand-drawn week onto two harmonics.)
func demoWeekly(d time.Weekday) float64 {
	w := 2 * math.Pi / 7 * float64(d)
	return 1 - 0.06*math.Cos(w) - 0.24*math.Sin(w) - 0.15*math.Cos(2*w) - 0.16*math.Sin(2*w)
}

// demoYearly is the seasonal swing in takings (more cycling in summer),
// peaking mid-July: 1 + 0.04 cos(2 pi (day of year - 196) / 365.25).
func demoYearly(day time.Time) float64 {
	return 1 + 0.04*math.Cos(2*math.Pi*float64(day.YearDay()-196)/365.25)
}

// demoExpected is a workshop's expected takings on day t (days since
// demoFirstDay) with the given trend.
func demoExpected(b demoBranch, trend float64, t int) float64 {
	day := demoFirstDay.AddDate(0, 0, t)
	return (b.base + trend*float64(t)) * demoWeekly(day.Weekday()) * demoYearly(day)
}

// demoJob is one finished repair job.
type demoJob struct {
	branch string
	day    time.Time
	amount float64
}

// demoDay makes the jobs of day t for every workshop: the day's takings
// are the expected amount times 1 + 7 % Gaussian noise, split into
// roughly one job per 55 euros.
func demoDay(rng *rand.Rand, t int) []demoJob {
	day := demoFirstDay.AddDate(0, 0, t)
	var jobs []demoJob
	for _, b := range demoBranches {
		total := demoExpected(b, b.trend, t) * (1 + 0.07*rng.NormFloat64())
		total = math.Max(total, 50)
		n := 1 + int(total/55*(0.8+0.4*rng.Float64()))
		weights := make([]float64, n)
		var sum float64
		for i := range weights {
			weights[i] = rng.ExpFloat64()
			sum += weights[i]
		}
		left := math.Round(total*100) / 100
		for i, w := range weights {
			amt := math.Round(total*w/sum*100) / 100
			if i == n-1 {
				amt = math.Round(left*100) / 100
			}
			left -= amt
			jobs = append(jobs, demoJob{branch: b.key, day: day, amount: amt})
		}
	}
	return jobs
}

// demoBudget is a workshop's budget for the month starting at month: the
// expected takings under the plan's trend, rounded to hundreds.
func demoBudget(b demoBranch, month time.Time) float64 {
	var sum float64
	for d := month; d.Month() == month.Month(); d = d.AddDate(0, 0, 1) {
		t := int(d.Sub(demoFirstDay).Hours() / 24)
		sum += demoExpected(b, b.plan, t)
	}
	return math.Round(sum/100) * 100
}

const demoSetupSQL = `
CREATE SCHEMA sidetrend_demo;
CREATE TABLE sidetrend_demo.workshops (
    branch text PRIMARY KEY,
    town   text NOT NULL
);
CREATE TABLE sidetrend_demo.repair_jobs (
    job_id      bigserial PRIMARY KEY,
    branch      text NOT NULL,
    finished_on date NOT NULL,
    amount      numeric(10, 2) NOT NULL
);
CREATE TABLE sidetrend_demo.budgets (
    branch text NOT NULL REFERENCES sidetrend_demo.workshops,
    month  date NOT NULL,
    budget numeric(12, 2) NOT NULL,
    PRIMARY KEY (branch, month)
);
COMMENT ON SCHEMA sidetrend_demo IS 'Made by sidetrend demo: repair jobs and budgets of an invented chain of bicycle workshops.';`

const demoTrackSQL = `SELECT sidetrend.track('sidetrend_demo.repair_jobs', 'finished_on', 'amount', '{branch}',
                       bucket => '1 day', period => 7, harmonics => 2, lambda => 0.98,
                       horizon => 62, name => 'demo_takings');`

const demoForecastSQL = `SELECT horizon AS ahead,
       (period_start AT TIME ZONE 'UTC')::date AS day,
       to_char(period_start AT TIME ZONE 'UTC', 'Dy') AS dow,
       round(lower95::numeric) AS lower95, round(lower80::numeric) AS lower80,
       round(forecast::numeric) AS forecast,
       round(upper80::numeric) AS upper80, round(upper95::numeric) AS upper95,
       '|' AS "|",
       round(cum_lower95::numeric) AS cum_lower95,
       round(cum_forecast::numeric) AS cum_forecast,
       round(cum_upper95::numeric) AS cum_upper95
FROM sidetrend.forecasts
WHERE tracker = 'demo_takings' AND series_key = 'brindlecombe' AND horizon <= 14
ORDER BY horizon;`

const demoSlopesSQL = `SELECT series_key AS branch,
       round(level::numeric) AS level,
       round(slope::numeric, 2) AS per_day,
       round(slope_se::numeric, 2) AS se,
       round(slope_t::numeric, 1) AS t,
       round(100 * 30 * slope_pct::numeric, 1) AS pct_per_30_days,
       direction
FROM sidetrend.slopes
WHERE tracker = 'demo_takings'
ORDER BY slope DESC;`

const demoMonthEndSQL = `WITH m AS (
    SELECT series_key AS branch, (as_of AT TIME ZONE 'UTC')::date AS as_of,
           date_trunc('month', as_of AT TIME ZONE 'UTC')::date AS month,
           (date_trunc('month', as_of AT TIME ZONE 'UTC') + interval '1 month - 1 day')::date AS last_day
    FROM sidetrend.slopes WHERE tracker = 'demo_takings'
), actual AS (
    SELECT m.branch, sum(j.amount) AS to_date
    FROM m JOIN sidetrend_demo.repair_jobs j
      ON j.branch = m.branch AND j.finished_on BETWEEN m.month AND m.as_of
    GROUP BY m.branch
), p AS (
    -- month to date plus the cumulative forecast of the days left
    SELECT m.branch, m.as_of, m.last_day - m.as_of AS days_left, a.to_date, b.budget,
           a.to_date + CASE WHEN m.last_day = m.as_of THEN 0 ELSE f.cum_forecast END::numeric AS projected,
           a.to_date + CASE WHEN m.last_day = m.as_of THEN 0 ELSE f.cum_lower95 END::numeric AS lower95,
           a.to_date + CASE WHEN m.last_day = m.as_of THEN 0 ELSE f.cum_upper95 END::numeric AS upper95
    FROM m
    JOIN actual a ON a.branch = m.branch
    JOIN sidetrend_demo.budgets b ON b.branch = m.branch AND b.month = m.month
    LEFT JOIN sidetrend.forecasts f ON f.tracker = 'demo_takings' AND f.series_key = m.branch
                                   AND f.horizon = m.last_day - m.as_of
)
SELECT branch, as_of, days_left, round(to_date) AS to_date,
       round(projected) AS projected, round(lower95) AS lower95, round(upper95) AS upper95,
       round(budget) AS budget, round(projected - budget) AS vs_budget,
       CASE WHEN projected IS NULL THEN 'month end is beyond the horizon'
            WHEN lower95 > budget THEN 'above budget'
            WHEN upper95 < budget THEN 'below budget'
            ELSE 'could go either way' END AS outlook
FROM p
ORDER BY branch;`

const demoCaution = "Caution: forecasts and intervals are estimates under model assumptions (a local trend with a\n" +
	"weekly cycle, independent errors of constant variance); real takings can break them. Use them\n" +
	"to inform decisions; the decisions stay with people."

// selfCommand is how to run this binary again from the current directory:
// as it was started when that was a path to a sidetrend binary
// (./bin/sidetrend), else sidetrend from PATH.
func selfCommand() string {
	if a := os.Args[0]; filepath.Base(a) == "sidetrend" {
		return shellQuote(a)
	}
	return "sidetrend"
}

func demoCommand() *cli.Command {
	return &cli.Command{
		Name:  "demo",
		Usage: "forecast an invented chain of bicycle workshops end to end: private Postgres, tracker, live sidecar, SQL, chart",
		Description: "Without --db the demo starts a private Postgres in a temporary directory and removes it\n" +
			"at the end (--keep leaves it running). With --db it uses that server: the demo's tables go\n" +
			"in schema " + demoSchema + " (dropped and made anew) and its tracker is " + demoTracker + ".",
		Flags: []cli.Flag{
			&cli.StringFlag{Name: "db", Usage: "use this Postgres instead of a private one (schema " + demoSchema + " is replaced)", EnvVars: []string{"SIDETREND_DEMO_DB"}},
			&cli.DurationFlag{Name: "live", Value: 5 * time.Second, Usage: "how long to insert new days while the sidecar runs", EnvVars: []string{"SIDETREND_DEMO_LIVE"}},
			&cli.DurationFlag{Name: "every", Value: 500 * time.Millisecond, Usage: "interval between two live days", EnvVars: []string{"SIDETREND_DEMO_EVERY"}},
			&cli.StringFlag{Name: "chart", Usage: "PNG to write (default sidetrend-demo.png in the temporary directory)", EnvVars: []string{"SIDETREND_DEMO_CHART"}},
			&cli.BoolFlag{Name: "keep", Usage: "leave the private Postgres running at the end and print how to reach it", EnvVars: []string{"SIDETREND_DEMO_KEEP"}},
		},
		Action: func(c *cli.Context) error {
			return runDemo(c.Context, c.App.Writer, demoOptions{
				db:      c.String("db"),
				live:    c.Duration("live"),
				every:   c.Duration("every"),
				chart:   c.String("chart"),
				keep:    c.Bool("keep"),
				verbose: c.Bool("verbose"),
			})
		},
	}
}

type demoOptions struct {
	db      string
	live    time.Duration
	every   time.Duration
	chart   string
	keep    bool
	verbose bool
}

func runDemo(ctx context.Context, w io.Writer, o demoOptions) (err error) {
	began := time.Now()
	if o.every <= 0 {
		return fmt.Errorf("--every %s is not a positive interval: use e.g. 500ms", o.every)
	}
	if o.live < 0 {
		return fmt.Errorf("--live %s is negative: use e.g. 5s, or 0 for no live part", o.live)
	}
	level := slog.LevelWarn
	if o.verbose {
		level = slog.LevelDebug
	}
	log := slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: level}))
	if o.chart == "" {
		o.chart = filepath.Join(os.TempDir(), "sidetrend-demo.png")
	}

	demoFirstDay = demoStart(time.Now(), demoLiveDays(o))
	fmt.Fprintln(w, "sidetrend demo: Spokes & Sprockets, five bicycle-repair workshops (an invented business).")
	fmt.Fprintln(w, "Every repair job is a row; sidetrend keeps forecasts of each workshop's daily takings.")
	fmt.Fprintln(w)

	db := o.db
	var emb *embedded
	if db == "" {
		fmt.Fprintln(w, "Starting a private Postgres in a temporary directory...")
		emb, err = startEmbedded(ctx, "", 0, "postgres", map[string]string{"fsync": "off"}, log)
		if err != nil {
			return err
		}
		defer func() {
			if o.keep && err == nil {
				emb.srv.Detach()
				self, url := selfCommand(), shellQuote(emb.url)
				fmt.Fprintf(w, "\nThe private Postgres keeps running (data in %s).\n", emb.srv.DataDir())
				fmt.Fprintf(w, "  explore: %s\n", emb.psqlCommand("postgres"))
				fmt.Fprintf(w, "  URL:     %s\n", emb.url)
				fmt.Fprintf(w, "  sidecar: %s run --db %s   (the demo's sidecar stopped with it; this keeps the forecasts current)\n", self, url)
				fmt.Fprintf(w, "  status:  %s status --db %s\n", self, url)
				fmt.Fprintf(w, "  stop:    kill -INT %d\n", emb.srv.PID())
				fmt.Fprintf(w, "  remove:  rm -rf %s   (once stopped: the data and the server's log)\n", shellQuote(filepath.Dir(emb.srv.DataDir())))
				return
			}
			emb.stop(log)
		}()
		fmt.Fprintf(w, "  up on 127.0.0.1:%d (socket in %s)\n\n", emb.srv.Port(), emb.srv.SocketDir())
		db = emb.url
	} else if o.keep {
		fmt.Fprintln(w, "(--keep only concerns the private Postgres; with --db your server is left as it is anyway)")
	}

	if _, err := pgsync.Migrate(ctx, db, log); err != nil {
		return err
	}
	pool, err := pgsync.Connect(ctx, db)
	if err != nil {
		return err
	}
	defer pool.Close()

	rng := rand.New(rand.NewPCG(1, 1))
	if err := demoSetup(ctx, w, pool, rng); err != nil {
		return err
	}

	// The sidecar, in this process. Every catch-up that leaves the change
	// log empty signals caught; waits check their condition on each signal.
	caught := make(chan struct{}, 1)
	runner := pgsync.NewRunner(db, pgsync.RunnerConfig{
		Poll: time.Second,
		OnCaughtUp: func(pgsync.Stats) {
			select {
			case caught <- struct{}{}:
			default:
			}
		},
	}, log)
	if err := runner.Start(ctx); err != nil {
		return err
	}
	defer runner.Stop()

	lastHistory := demoFirstDay.AddDate(0, 0, demoHistoryDays-1)
	t0 := time.Now()
	if err := demoWait(ctx, pool, caught, lastHistory); err != nil {
		return fmt.Errorf("wait for the sidecar to take in the history: %w", err)
	}
	fmt.Fprintf(w, "The sidecar backfilled %d workshops from %s to %s and fitted them in %s.\n\n",
		len(demoBranches), demoFirstDay.Format(time.DateOnly), lastHistory.Format(time.DateOnly), time.Since(t0).Round(time.Millisecond))

	if err := demoLive(ctx, w, pool, rng, caught, o); err != nil {
		return err
	}
	runner.Stop()

	fmt.Fprintf(w, "Next 14 days for %s: the forecast between its 80 %% and 95 %% prediction bounds, then running totals:\n", demoFocus)
	if err := demoTable(ctx, w, pool, demoForecastSQL); err != nil {
		return err
	}
	fmt.Fprintln(w, "Trend slopes of all workshops (euros per day; direction is up or down when |t| >= 2):")
	if err := demoTable(ctx, w, pool, demoSlopesSQL); err != nil {
		return err
	}
	fmt.Fprintln(w, "Month-end projection against budget (takings to date + cumulative forecast of the days left):")
	if err := demoTable(ctx, w, pool, demoMonthEndSQL); err != nil {
		return err
	}

	d, err := pgsync.LoadSeries(ctx, pool, demoTracker, demoFocus)
	if err != nil {
		return err
	}
	cd, err := buildChart(d, d.Starts[max(0, len(d.Starts)-84)])
	if err != nil {
		return err
	}
	cd.Title = "Spokes & Sprockets, " + demoFocus + ": daily takings"
	cd.YLabel = "takings per day (euros)"
	if err := writeChart(cd, o.chart, 1100, 550); err != nil {
		return err
	}
	fmt.Fprintf(w, "Chart of %s: %s\n", demoFocus, o.chart)
	plotCmd := fmt.Sprintf("sidetrend plot --tracker %s --series %s --out chart.png", demoTracker, demoFocus)
	if emb != nil && !o.keep {
		fmt.Fprintf(w, "(This private Postgres goes away at the end; after `sidetrend demo --keep`, `%s --db URL` draws it again.)\n\n", plotCmd)
	} else {
		fmt.Fprintf(w, "`%s` draws it again, any other series too.\n\n", plotCmd)
	}
	fmt.Fprintln(w, demoCaution)
	fmt.Fprintf(w, "\nThe demo took %s.\n", time.Since(began).Round(100*time.Millisecond))
	return nil
}

// demoSetup makes the demo's tables, loads the history and the budgets,
// and registers the tracker. With --db a previous demo's tracker and
// schema are removed first.
func demoSetup(ctx context.Context, w io.Writer, pool *pgxpool.Pool, rng *rand.Rand) error {
	var old bool
	if err := pool.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM sidetrend.trackers WHERE name = $1)`, demoTracker).Scan(&old); err != nil {
		return fmt.Errorf("look for an earlier demo: %w", err)
	}
	if old {
		if _, err := pgsync.Untrack(ctx, pool, demoTracker); err != nil {
			return err
		}
	}
	if _, err := pool.Exec(ctx, `DROP SCHEMA IF EXISTS `+demoSchema+` CASCADE`); err != nil {
		return fmt.Errorf("drop the earlier demo schema: %w", err)
	}
	if _, err := pool.Exec(ctx, demoSetupSQL); err != nil {
		return fmt.Errorf("create the demo tables: %w", err)
	}
	rows := make([][]any, 0, len(demoBranches))
	for _, b := range demoBranches {
		rows = append(rows, []any{b.key, b.town})
	}
	if _, err := pool.CopyFrom(ctx, pgx.Identifier{demoSchema, "workshops"}, []string{"branch", "town"}, pgx.CopyFromRows(rows)); err != nil {
		return fmt.Errorf("load workshops: %w", err)
	}
	var jobs [][]any
	for t := range demoHistoryDays {
		for _, j := range demoDay(rng, t) {
			jobs = append(jobs, []any{j.branch, j.day, j.amount})
		}
	}
	if _, err := pool.CopyFrom(ctx, pgx.Identifier{demoSchema, "repair_jobs"}, []string{"branch", "finished_on", "amount"}, pgx.CopyFromRows(jobs)); err != nil {
		return fmt.Errorf("load repair jobs: %w", err)
	}
	var budgets [][]any
	for _, b := range demoBranches {
		// Budgets for every month of the data and the next two.
		end := demoFirstDay.AddDate(0, 0, demoHistoryDays+demoMaxLiveDays)
		end = time.Date(end.Year(), end.Month()+3, 1, 0, 0, 0, 0, time.UTC)
		first := time.Date(demoFirstDay.Year(), demoFirstDay.Month(), 1, 0, 0, 0, 0, time.UTC)
		for m := first; m.Before(end); m = m.AddDate(0, 1, 0) {
			budgets = append(budgets, []any{b.key, m, demoBudget(b, m)})
		}
	}
	if _, err := pool.CopyFrom(ctx, pgx.Identifier{demoSchema, "budgets"}, []string{"branch", "month", "budget"}, pgx.CopyFromRows(budgets)); err != nil {
		return fmt.Errorf("load budgets: %w", err)
	}
	fmt.Fprintf(w, "Loaded %d repair jobs (%s to %s) into %s.repair_jobs and monthly budgets into %s.budgets.\n",
		len(jobs), demoFirstDay.Format(time.DateOnly), demoFirstDay.AddDate(0, 0, demoHistoryDays-1).Format(time.DateOnly), demoSchema, demoSchema)
	fmt.Fprintln(w, "Registered the table with sidetrend (daily sums per branch, linear trend plus a weekly cycle):")
	fmt.Fprintln(w, indent(demoTrackSQL))
	fmt.Fprintln(w)
	if _, err := pool.Exec(ctx, demoTrackSQL); err != nil {
		return fmt.Errorf("track the repair jobs: %w", err)
	}
	return nil
}

// demoWait waits until the sidecar has folded day into every workshop's
// series: it checks on each catch-up signal, and gives up after
// demoWaitTimeout.
func demoWait(ctx context.Context, pool *pgxpool.Pool, caught <-chan struct{}, day time.Time) error {
	deadline := time.NewTimer(demoWaitTimeout)
	defer deadline.Stop()
	for {
		var n int
		err := pool.QueryRow(ctx, `
			SELECT count(*) FROM sidetrend.series_status
			WHERE tracker = $1 AND state = 'ready' AND last_bucket >= $2`, demoTracker, day).Scan(&n)
		if err != nil {
			return err
		}
		if n == len(demoBranches) {
			return nil
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-deadline.C:
			return fmt.Errorf("%d of %d series reached %s within %s", n, len(demoBranches), day.Format(time.DateOnly), demoWaitTimeout)
		case <-caught:
		}
	}
}

const demoLiveSQL = `
SELECT f.forecast, f.lower95, f.upper95, (f.period_start AT TIME ZONE 'UTC')::date
FROM sidetrend.forecasts f
WHERE f.tracker = $1 AND f.series_key = $2 AND f.horizon = 1`

const demoLiveSlopesSQL = `SELECT series_key, slope FROM sidetrend.slopes WHERE tracker = $1 ORDER BY series_key`

// demoLive inserts one new day for every workshop each o.every for o.live
// (at most demoMaxLiveDays) and prints, after the sidecar has taken each
// in, the focus workshop's next-day forecast and every slope.
func demoLive(ctx context.Context, w io.Writer, pool *pgxpool.Pool, rng *rand.Rand, caught <-chan struct{}, o demoOptions) error {
	days := demoLiveDays(o)
	if days <= 0 {
		return nil
	}
	fmt.Fprintf(w, "Live: a new day of repair jobs every %s (%d days); after each, the sidecar updates every series.\n", o.every, days)
	// Columns: the new day, the focus workshop's takings that day, its
	// forecast for the next day between its 95 % bounds, and every slope.
	const head = "%-10s  %12s  %-6s  %7s  %8s  %7s |"
	header := fmt.Sprintf(head, "new day", demoFocus, "next", "lower95", "forecast", "upper95")
	for _, b := range demoBranches {
		header += fmt.Sprintf(" %12s", b.key)
	}
	fmt.Fprintf(w, "%*s%s\n", len(fmt.Sprintf(head, "", "", "", "", "", "")), "", " slope, euros per day")
	fmt.Fprintln(w, header+"  sidecar")
	tick := time.NewTicker(o.every)
	defer tick.Stop()
	for i := range days {
		if i > 0 {
			select {
			case <-ctx.Done():
				return ctx.Err()
			case <-tick.C:
			}
		}
		t := demoHistoryDays + i
		jobs := demoDay(rng, t)
		branches := make([]string, len(jobs))
		dates := make([]time.Time, len(jobs))
		amounts := make([]float64, len(jobs))
		var focusTotal float64
		for k, j := range jobs {
			branches[k], dates[k], amounts[k] = j.branch, j.day, j.amount
			if j.branch == demoFocus {
				focusTotal += j.amount
			}
		}
		if _, err := pool.Exec(ctx, `
			INSERT INTO sidetrend_demo.repair_jobs (branch, finished_on, amount)
			SELECT * FROM unnest($1::text[], $2::date[], $3::numeric[])`, branches, dates, amounts); err != nil {
			return fmt.Errorf("insert day %d: %w", t, err)
		}
		inserted := time.Now()
		day := demoFirstDay.AddDate(0, 0, t)
		if err := demoWait(ctx, pool, caught, day); err != nil {
			return fmt.Errorf("wait for the sidecar to take in %s: %w", day.Format(time.DateOnly), err)
		}
		took := time.Since(inserted)
		var forecast, lo, hi float64 // the forecast and its 95 % bounds
		var next time.Time
		if err := pool.QueryRow(ctx, demoLiveSQL, demoTracker, demoFocus).Scan(&forecast, &lo, &hi, &next); err != nil {
			return fmt.Errorf("read the next-day forecast: %w", err)
		}
		slopes := map[string]float64{}
		rows, err := pool.Query(ctx, demoLiveSlopesSQL, demoTracker)
		if err != nil {
			return fmt.Errorf("read slopes: %w", err)
		}
		for rows.Next() {
			var k string
			var s float64
			if err := rows.Scan(&k, &s); err != nil {
				rows.Close()
				return fmt.Errorf("read slopes: %w", err)
			}
			slopes[k] = s
		}
		if err := rows.Err(); err != nil {
			return fmt.Errorf("read slopes: %w", err)
		}
		line := fmt.Sprintf(head, day.Format(time.DateOnly), fmt.Sprintf("%.2f", focusTotal),
			next.Format("Mon 02"), fmt.Sprintf("%.0f", lo), fmt.Sprintf("%.0f", forecast), fmt.Sprintf("%.0f", hi))
		for _, b := range demoBranches {
			line += fmt.Sprintf(" %+12.2f", slopes[b.key])
		}
		fmt.Fprintf(w, "%s  %5dms\n", line, took.Milliseconds())
	}
	fmt.Fprintln(w)
	return nil
}

// demoTable prints the SQL, runs it and prints its result as an aligned
// table: numbers to the right, text to the left.
func demoTable(ctx context.Context, w io.Writer, pool *pgxpool.Pool, sql string) error {
	fmt.Fprintln(w, indent(sql))
	rows, err := pool.Query(ctx, sql)
	if err != nil {
		return fmt.Errorf("demo query: %w", err)
	}
	defer rows.Close()
	var head []string
	for _, f := range rows.FieldDescriptions() {
		head = append(head, f.Name)
	}
	numeric := make([]bool, len(head))
	var cells [][]string
	for rows.Next() {
		vals, err := rows.Values()
		if err != nil {
			return fmt.Errorf("demo query: %w", err)
		}
		row := make([]string, len(vals))
		for i, v := range vals {
			var isNum bool
			row[i], isNum = demoCell(v)
			numeric[i] = numeric[i] || isNum
		}
		cells = append(cells, row)
	}
	if err := rows.Err(); err != nil {
		return fmt.Errorf("demo query: %w", err)
	}
	width := make([]int, len(head))
	for i, h := range head {
		width[i] = len(h)
		for _, r := range cells {
			width[i] = max(width[i], len(r[i]))
		}
	}
	line := func(r []string) {
		var b strings.Builder
		b.WriteString("  ")
		for i, s := range r {
			if i > 0 {
				b.WriteString("  ")
			}
			if numeric[i] {
				fmt.Fprintf(&b, "%*s", width[i], s)
			} else {
				fmt.Fprintf(&b, "%-*s", width[i], s)
			}
		}
		fmt.Fprintln(w, strings.TrimRight(b.String(), " "))
	}
	line(head)
	rule := make([]string, len(head))
	for i := range rule {
		rule[i] = strings.Repeat("-", width[i])
	}
	line(rule)
	for _, r := range cells {
		line(r)
	}
	fmt.Fprintln(w)
	return nil
}

// demoCell formats one value and says whether it is a number.
func demoCell(v any) (string, bool) {
	switch x := v.(type) {
	case nil:
		return "", false
	case pgtype.Numeric:
		f, err := x.Float64Value()
		if err != nil || !f.Valid {
			return "", true
		}
		if x.Exp >= 0 {
			return fmt.Sprintf("%.0f", f.Float64), true
		}
		return fmt.Sprintf("%.*f", -x.Exp, f.Float64), true
	case float64:
		return fmt.Sprintf("%.2f", x), true
	case float32:
		return fmt.Sprintf("%.2f", x), true
	case int64, int32, int16, int:
		return fmt.Sprintf("%d", x), true
	case time.Time:
		if x.Hour() == 0 && x.Minute() == 0 && x.Second() == 0 {
			return x.Format(time.DateOnly), false
		}
		return x.Format(time.RFC3339), false
	default:
		return fmt.Sprint(x), false
	}
}

// indent prefixes every line of the SQL so that it stands apart from the
// results.
func indent(sql string) string {
	lines := strings.Split(strings.TrimSpace(sql), "\n")
	return "    " + strings.Join(lines, "\n    ")
}
