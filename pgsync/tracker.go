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
       coalesce(lambda, 0.95), lambda IS NULL, burn_in, horizon, history_buckets, backfilled, status,
       coalesce(season_lambda, 0)
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
			&t.Spec.BurnIn, &t.Horizon, &t.History, &t.Backfilled, &t.Status, &t.Spec.SeasonLambda); err != nil {
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
	sql += ")"
	var id int
	if err := pool.QueryRow(ctx, sql, args).Scan(&id); err != nil {
		return 0, fmt.Errorf("track %s: %w", o.Table, err)
	}
	return id, nil
}

// Untrack calls sidetrend.untrack(name).
func Untrack(ctx context.Context, pool *pgxpool.Pool, name string) error {
	if _, err := pool.Exec(ctx, `SELECT sidetrend.untrack($1)`, name); err != nil {
		return fmt.Errorf("untrack %s: %w", name, err)
	}
	return nil
}
