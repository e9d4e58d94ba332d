package main

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5/pgxpool"

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

func (s liveSource) State(ctx context.Context, tracker, key string) (*estimator.State, error) {
	d, err := pgsync.LoadSeries(ctx, s.pool, tracker, key)
	if err != nil {
		return nil, err
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
	return d.Values, nil
}
