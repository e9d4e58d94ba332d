// Package pgsync is everything sidetrend runs against Postgres: migrations,
// the tracker registry, draining the change log into bucket points and
// estimator states, replays, and the LISTEN loop. All SQL the sidecar runs at
// run time lives in this package, schema-qualified.
package pgsync

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// Tracker is one row of sidetrend.trackers as the sidecar uses it.
type Tracker struct {
	ID         int
	Name       string
	Source     string // schema-qualified, quoted
	Bucket     string // interval text, as Postgres prints it
	TZ         string
	Agg        string
	Empty      string // "zero" or "gap"
	Spec       estimator.Spec
	LambdaAuto bool // created with lambda => NULL
	Horizon    int
	History    int // history_buckets: buckets of served forecasts kept
	Backfilled bool
	Status     string
	Version    int // settings_version: moves with every sidetrend.alter_tracker
	// Transform is "none" or "log": a log tracker's state is fitted on the
	// logarithms of its bucket values (see Tracker.fitValue).
	Transform string

	// cal numbers the tracker's buckets in Go, the twin of the SQL bucket
	// functions (package calendar); calErr says why it could not be built
	// (a zone Go does not know, say), and then the drain asks Postgres.
	cal    calendar.Calendar
	calErr error
}

// bucketEnd returns when bucket i ends (the next bucket starts), or false
// when Go has no calendar for the tracker.
func (t *Tracker) bucketEnd(i int64) (time.Time, bool) {
	if t.calErr != nil {
		return time.Time{}, false
	}
	return t.cal.Start(i + 1), true
}

func (t *Tracker) buildCalendar() {
	w, err := calendar.ParseWidth(t.Bucket)
	if err == nil {
		t.cal, err = calendar.New(w, t.TZ)
	}
	t.calErr = err
}

const trackersSQL = `
SELECT id, name, source_name, bucket::text, tz, agg, empty, degree, coalesce(period, 0), harmonics,
       coalesce(lambda, 0.95), lambda IS NULL, burn_in, horizon, history_buckets, backfilled, status, settings_version,
       coalesce(season_lambda, 0), transform
FROM sidetrend.trackers ORDER BY id`

// LoadTrackers reads every tracker.
func LoadTrackers(ctx context.Context, q querier) (map[int]*Tracker, error) {
	rows, err := q.Query(ctx, trackersSQL)
	if err != nil {
		return nil, fmt.Errorf("load trackers: %w", err)
	}
	out := map[int]*Tracker{}
	for rows.Next() {
		t := &Tracker{}
		if err := rows.Scan(&t.ID, &t.Name, &t.Source, &t.Bucket, &t.TZ, &t.Agg, &t.Empty,
			&t.Spec.Degree, &t.Spec.Period, &t.Spec.Harmonics, &t.Spec.Lambda, &t.LambdaAuto,
			&t.Spec.BurnIn, &t.Horizon, &t.History, &t.Backfilled, &t.Status, &t.Version, &t.Spec.SeasonLambda, &t.Transform); err != nil {
			rows.Close()
			return nil, fmt.Errorf("load trackers: %w", err)
		}
		// A seasonal factor without seasonal terms, or equal to lambda,
		// changes nothing.
		t.Spec = t.Spec.Canonical()
		t.buildCalendar()
		out[t.ID] = t
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("load trackers: %w", err)
	}
	return out, nil
}

// querier is what both a pool and a transaction offer.
type querier interface {
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
	QueryRow(ctx context.Context, sql string, args ...any) pgx.Row
}

// TrackOptions are the arguments of sidetrend.track(); nil pointers take the
// function's defaults.
type TrackOptions struct {
	Table     string
	Time      string
	Value     string
	Keys      []string
	Bucket    *string
	Agg       *string
	Degree    *int
	Period    *float64
	Harmonics *int
	Lambda    *float64
	LambdaSet bool // Lambda nil and LambdaSet: pass NULL (tune automatically)
	Horizon   *int
	Name      *string
	Empty     *string
	TZ        *string
	BurnIn    *int
	Transform *string // "none" or "log"
}

// Track calls sidetrend.track() with named arguments and returns the new
// tracker's id. Validation happens in the function, so the SQL and the CLI
// give the same errors.
func Track(ctx context.Context, pool *pgxpool.Pool, o TrackOptions) (int, error) {
	args := pgx.NamedArgs{"source": o.Table, "time_col": o.Time, "value_col": o.Value}
	sql := `SELECT sidetrend.track(source => @source::regclass, time_col => @time_col, value_col => @value_col`
	add := func(name string, v any, cast string) {
		args[name] = v
		sql += fmt.Sprintf(", %s => @%s::%s", name, name, cast)
	}
	if o.Keys != nil {
		add("key_cols", o.Keys, "text[]")
	}
	if o.Bucket != nil {
		add("bucket", *o.Bucket, "interval")
	}
	if o.Agg != nil {
		add("agg", *o.Agg, "text")
	}
	if o.Degree != nil {
		add("degree", *o.Degree, "int")
	}
	if o.Period != nil {
		add("period", *o.Period, "float8")
	}
	if o.Harmonics != nil {
		add("harmonics", *o.Harmonics, "int")
	}
	if o.Lambda != nil || o.LambdaSet {
		add("lambda", o.Lambda, "float8")
	}
	if o.Horizon != nil {
		add("horizon", *o.Horizon, "int")
	}
	if o.Name != nil {
		add("name", *o.Name, "text")
	}
	if o.Empty != nil {
		add("empty", *o.Empty, "text")
	}
	if o.TZ != nil {
		add("tz", *o.TZ, "text")
	}
	if o.BurnIn != nil {
		add("burn_in", *o.BurnIn, "int")
	}
	if o.Transform != nil {
		add("transform", *o.Transform, "text")
	}
	sql += ")"
	var id int
	if err := pool.QueryRow(ctx, sql, args).Scan(&id); err != nil {
		return 0, fmt.Errorf("track %s: %w", o.Table, err)
	}
	return id, nil
}

// Removed is what an untrack removed.
type Removed struct {
	Source                                      string
	Series, Points, Changes, Rejects, Forecasts int64
}

// untrackCountsSQL counts what sidetrend.untrack is about to remove.
const untrackCountsSQL = `
SELECT t.source_name,
       (SELECT count(*) FROM sidetrend.series s WHERE s.tracker_id = t.id),
       (SELECT count(*) FROM sidetrend.points p WHERE p.tracker_id = t.id),
       (SELECT count(*) FROM sidetrend.changes c WHERE c.tracker_id = t.id),
       (SELECT count(*) FROM sidetrend.rejects r WHERE r.tracker_id = t.id),
       (SELECT count(*) FROM sidetrend.forecast_issues i WHERE i.tracker_id = t.id)
FROM sidetrend.trackers t WHERE t.name = $1`

// Untrack calls sidetrend.untrack(name) and says what it removed (counted
// in the same transaction).
func Untrack(ctx context.Context, pool *pgxpool.Pool, name string) (Removed, error) {
	var r Removed
	err := pgx.BeginFunc(ctx, pool, func(tx pgx.Tx) error {
		// A name that is not a tracker leaves the counts at zero; untrack
		// then says so.
		if err := tx.QueryRow(ctx, untrackCountsSQL, name).Scan(&r.Source, &r.Series, &r.Points, &r.Changes, &r.Rejects, &r.Forecasts); err != nil && err != pgx.ErrNoRows {
			return err
		}
		_, err := tx.Exec(ctx, `SELECT sidetrend.untrack($1)`, name)
		return err
	})
	if err != nil {
		return Removed{}, fmt.Errorf("untrack %s: %w", name, err)
	}
	return r, nil
}

// AlterOptions are the arguments of sidetrend.alter_tracker(); nil pointers
// keep the tracker's setting.
type AlterOptions struct {
	Horizon    *int
	Degree     *int
	Period     *float64 // 0 removes the season
	Harmonics  *int
	Lambda     *float64
	LambdaAuto bool // let the sidecar choose lambda
	BurnIn     *int
	History    *int    // history_buckets
	Span       *string // interval text
	TZ         *string
	Bucket     *string // interval text
	Transform  *string // "none" or "log"
}

// AlterTracker calls sidetrend.alter_tracker() with named arguments and
// returns its account of what changed and what follows.
func AlterTracker(ctx context.Context, pool *pgxpool.Pool, name string, o AlterOptions) (string, error) {
	args := pgx.NamedArgs{"name": name}
	sql := `SELECT sidetrend.alter_tracker(name => @name`
	add := func(arg string, v any, cast string) {
		args[arg] = v
		sql += fmt.Sprintf(", %s => @%s::%s", arg, arg, cast)
	}
	if o.Horizon != nil {
		add("horizon", *o.Horizon, "int")
	}
	if o.Degree != nil {
		add("degree", *o.Degree, "int")
	}
	if o.Period != nil {
		add("period", *o.Period, "float8")
	}
	if o.Harmonics != nil {
		add("harmonics", *o.Harmonics, "int")
	}
	if o.Lambda != nil {
		add("lambda", *o.Lambda, "float8")
	}
	if o.LambdaAuto {
		add("lambda_auto", true, "boolean")
	}
	if o.BurnIn != nil {
		add("burn_in", *o.BurnIn, "int")
	}
	if o.History != nil {
		add("history_buckets", *o.History, "int")
	}
	if o.Span != nil {
		add("span", *o.Span, "interval")
	}
	if o.TZ != nil {
		add("tz", *o.TZ, "text")
	}
	if o.Bucket != nil {
		add("bucket", *o.Bucket, "interval")
	}
	if o.Transform != nil {
		add("transform", *o.Transform, "text")
	}
	sql += ")"
	var msg string
	if err := pool.QueryRow(ctx, sql, args).Scan(&msg); err != nil {
		return "", fmt.Errorf("alter %s: %w", name, err)
	}
	return msg, nil
}
