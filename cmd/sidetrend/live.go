package main

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
	"github.com/sidetrend/sidetrend/pgsync"
	"github.com/sidetrend/sidetrend/sqlwire"
)

// liveSource is the endpoint's read-only view of the sidecar's stored
// state: the series rows, their states and their points.
type liveSource struct {
	pool *pgxpool.Pool
}

var _ sqlwire.Source = liveSource{}

func (s liveSource) Series(ctx context.Context, tracker, key *string) ([]sqlwire.SeriesInfo, error) {
	rows, err := pgsync.ListSeries(ctx, s.pool, tracker, key)
	if err != nil {
		return nil, err
	}
	out := make([]sqlwire.SeriesInfo, 0, len(rows))
	cals := map[int]calendar.Calendar{}
	for _, r := range rows {
		cal, ok := cals[r.Tracker.ID]
		if !ok {
			w, err := calendar.ParseWidth(r.Tracker.Bucket)
			if err != nil {
				return nil, fmt.Errorf("tracker %q: %w", r.Tracker.Name, err)
			}
			if cal, err = calendar.New(w, r.Tracker.TZ); err != nil {
				return nil, fmt.Errorf("tracker %q: %w", r.Tracker.Name, err)
			}
			cals[r.Tracker.ID] = cal
		}
		spec := r.Tracker.Spec
		spec.Lambda = r.Lambda
		state := "warming"
		if r.Ready {
			state = "ready"
		}
		out = append(out, sqlwire.SeriesInfo{Tracker: r.Tracker.Name, Key: r.Key, Points: r.Points,
			FirstBucket: r.FirstBucket, LastBucket: r.LastBucket, Spec: spec, Calendar: cal,
			LastIndex: r.LastIndex, State: state})
	}
	return out, nil
}

// errLiveLog refuses a log tracker's series: the endpoint's forecasts,
// what-ifs and backtests work on the values as they are, and a log tracker's
// stored state is fitted on their logarithms.
func errLiveLog(tracker string) error {
	return fmt.Errorf("tracker %q fits the logarithms of its values (transform log), which the live endpoint does not serve yet: read sidetrend.forecasts, or use sidetrend forecast --transform log offline", tracker)
}

func (s liveSource) State(ctx context.Context, tracker, key string) (*estimator.State, error) {
	d, err := pgsync.LoadSeries(ctx, s.pool, tracker, key)
	if err != nil {
		return nil, err
	}
	if d.Tracker.Transform == "log" {
		return nil, errLiveLog(tracker)
	}
	if d.State == nil {
		return nil, errors.New("the series has no folded bucket yet")
	}
	return estimator.DecodeFor(d.State, d.Spec)
}

func (s liveSource) Values(ctx context.Context, tracker, key string) ([]float64, error) {
	d, err := pgsync.LoadSeries(ctx, s.pool, tracker, key)
	if err != nil {
		return nil, err
	}
	if d.Tracker.Transform == "log" {
		return nil, errLiveLog(tracker)
	}
	return d.Values, nil
}

// liveLimitFlags are the live endpoint's TLS requirement and limits
// (sqlwire.Limits; README, "Live endpoint limits").
func liveLimitFlags() []cli.Flag {
	return []cli.Flag{
		&cli.BoolFlag{Name: "sql-require-tls", Usage: "refuse live endpoint clients that do not use TLS (needs --tls-cert and --tls-key)", EnvVars: []string{"SIDETREND_SQL_REQUIRE_TLS"}},
		&cli.IntFlag{Name: "sql-max-connections", Value: 200, Usage: "logged-in sessions the live endpoint serves at once", EnvVars: []string{"SIDETREND_SQL_MAX_CONNECTIONS"}},
		&cli.IntFlag{Name: "sql-max-unauthenticated", Value: sqlwire.DefaultMaxUnauthenticated, Usage: "connections that have not logged in yet; beyond it new ones are closed at once", EnvVars: []string{"SIDETREND_SQL_MAX_UNAUTHENTICATED"}},
		&cli.DurationFlag{Name: "sql-statement-timeout", Value: sqlwire.DefaultStatementTimeout, Usage: "stop a live endpoint statement that runs longer (SQLSTATE 57014)", EnvVars: []string{"SIDETREND_SQL_STATEMENT_TIMEOUT"}},
		&cli.IntFlag{Name: "sql-max-in-list", Value: sqlwire.DefaultMaxInList, Usage: "values one IN (...) list or ANY array may have", EnvVars: []string{"SIDETREND_SQL_MAX_IN_LIST"}},
		&cli.Int64Flag{Name: "sql-max-rows", Value: sqlwire.DefaultMaxRows, Usage: "rows one statement may compute", EnvVars: []string{"SIDETREND_SQL_MAX_ROWS"}},
		&cli.Int64Flag{Name: "sql-max-statement-memory-mb", Value: sqlwire.DefaultMaxStatementMemory >> 20, Usage: "MiB one statement may hold for a sort, GROUP BY or join", EnvVars: []string{"SIDETREND_SQL_MAX_STATEMENT_MEMORY_MB"}},
		&cli.IntFlag{Name: "sql-max-message-kb", Value: sqlwire.DefaultMaxMessageSize >> 10, Usage: "KiB one message (a query's text and parameters) may have", EnvVars: []string{"SIDETREND_SQL_MAX_MESSAGE_KB"}},
		&cli.DurationFlag{Name: "sql-auth-failure-delay", Value: sqlwire.DefaultAuthFailureDelay, Usage: "delay after a failed login, doubling with each further failure from the same address", EnvVars: []string{"SIDETREND_SQL_AUTH_FAILURE_DELAY"}},
		&cli.DurationFlag{Name: "sql-auth-failure-max-delay", Value: sqlwire.DefaultAuthFailureMaxDelay, Usage: "longest delay after a failed login", EnvVars: []string{"SIDETREND_SQL_AUTH_FAILURE_MAX_DELAY"}},
	}
}

// liveConfig reads the live endpoint's TLS and limit flags.
func liveConfig(c *cli.Context) (sqlwire.Config, error) {
	positive := func(name string, v int64) error {
		if v < 1 {
			return fmt.Errorf("--%s %d: use a positive number", name, v)
		}
		return nil
	}
	for _, name := range []string{"sql-max-connections", "sql-max-unauthenticated", "sql-max-in-list", "sql-max-message-kb"} {
		if err := positive(name, int64(c.Int(name))); err != nil {
			return sqlwire.Config{}, err
		}
	}
	for _, name := range []string{"sql-max-rows", "sql-max-statement-memory-mb"} {
		if err := positive(name, c.Int64(name)); err != nil {
			return sqlwire.Config{}, err
		}
	}
	for _, name := range []string{"sql-statement-timeout", "sql-auth-failure-delay", "sql-auth-failure-max-delay"} {
		if d := c.Duration(name); d <= 0 {
			return sqlwire.Config{}, fmt.Errorf("--%s %v: use a positive duration such as 30s or 250ms", name, d)
		}
	}
	return sqlwire.Config{
		TLSCertFile:    c.String("tls-cert"),
		TLSKeyFile:     c.String("tls-key"),
		RequireTLS:     c.Bool("sql-require-tls"),
		MaxConnections: c.Int("sql-max-connections"),
		Limits: sqlwire.Limits{
			StatementTimeout:    c.Duration("sql-statement-timeout"),
			MaxInList:           c.Int("sql-max-in-list"),
			MaxRows:             c.Int64("sql-max-rows"),
			MaxStatementMemory:  c.Int64("sql-max-statement-memory-mb") << 20,
			MaxMessageSize:      c.Int("sql-max-message-kb") << 10,
			MaxUnauthenticated:  c.Int("sql-max-unauthenticated"),
			AuthFailureDelay:    c.Duration("sql-auth-failure-delay"),
			AuthFailureMaxDelay: c.Duration("sql-auth-failure-max-delay"),
		},
	}, nil
}
