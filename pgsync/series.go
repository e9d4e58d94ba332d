package pgsync

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/estimator"
)

// ErrNoSeries is returned when a tracker or series does not exist.
var ErrNoSeries = errors.New("pgsync: no such series")

// SeriesData is one series as the estimator sees it: the bucket values from
// the first observed bucket to the newest folded one, after the tracker's
// empty-bucket policy (zero, or NaN for a gap), plus its stored state.
type SeriesData struct {
	Tracker    *Tracker
	Key        string
	Spec       estimator.Spec // the tracker's model with the series' own lambda if it has one
	FirstIndex int64          // bucket index of Values[0]
	LastIndex  int64          // bucket index of the newest folded bucket
	Values     []float64
	Counts     []int64     // source rows in each bucket of Values (0: none)
	Starts     []time.Time // start of each bucket in Values
	State      []byte      // stored estimator state, nil while nothing is folded
	Ready      bool
}

const seriesRowSQL = `
SELECT s.folded_through, s.first_bucket, s.state, s.ready, s.lambda
FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE t.name = $1 AND s.series_key = $2`

const seriesPointsSQL = `
SELECT g.i, sidetrend.bucket_start(g.i, t.bucket, t.tz), p.n, p.sum, p.min, p.max, p.last_v
FROM sidetrend.trackers t
CROSS JOIN generate_series($2::bigint, $3::bigint) AS g(i)
LEFT JOIN sidetrend.points p ON p.tracker_id = t.id AND p.series_key = $4 AND p.bucket = g.i
WHERE t.name = $1
ORDER BY g.i`

// LoadSeries reads one series' values and stored state.
func LoadSeries(ctx context.Context, q querier, tracker, key string) (*SeriesData, error) {
	ts, err := LoadTrackers(ctx, q)
	if err != nil {
		return nil, err
	}
	var t *Tracker
	for _, x := range ts {
		if x.Name == tracker {
			t = x
		}
	}
	if t == nil {
		return nil, fmt.Errorf("tracker %q: %w", tracker, ErrNoSeries)
	}
	d := &SeriesData{Tracker: t, Key: key, Spec: t.Spec}
	var folded, first *int64
	var lambda *float64
	err = q.QueryRow(ctx, seriesRowSQL, tracker, key).Scan(&folded, &first, &d.State, &d.Ready, &lambda)
	if errors.Is(err, pgx.ErrNoRows) {
		return nil, fmt.Errorf("tracker %q series %q: %w", tracker, key, ErrNoSeries)
	}
	if err != nil {
		return nil, fmt.Errorf("load series %q/%q: %w", tracker, key, err)
	}
	if lambda != nil {
		d.Spec.Lambda = *lambda
	}
	if folded == nil || first == nil {
		return d, nil
	}
	d.FirstIndex, d.LastIndex = *first, *folded
	rows, err := q.Query(ctx, seriesPointsSQL, tracker, *first, *folded, key)
	if err != nil {
		return nil, fmt.Errorf("load points of %q/%q: %w", tracker, key, err)
	}
	defer rows.Close()
	for rows.Next() {
		var p point
		var start time.Time
		var n *int64
		var sum *float64
		if err := rows.Scan(&p.bucket, &start, &n, &sum, &p.min, &p.max, &p.last); err != nil {
			return nil, fmt.Errorf("load points of %q/%q: %w", tracker, key, err)
		}
		if n != nil {
			p.n = *n
		}
		if sum != nil {
			p.sum = *sum
		}
		y, ok := t.value(p)
		switch {
		case ok:
		case t.Empty == "zero":
			y = 0
		default:
			y = math.NaN()
		}
		d.Values = append(d.Values, y)
		d.Counts = append(d.Counts, p.n)
		d.Starts = append(d.Starts, start)
	}
	return d, rows.Err()
}

// FitValues returns bucket values on the scale the tracker's states are
// fitted on: for a log tracker a copy holding their natural logarithms, NaN
// (a gap) for a value that is not positive, as the drain skips it; ys
// itself otherwise.
func (t *Tracker) FitValues(ys []float64) []float64 {
	if !t.logScale() {
		return ys
	}
	out := make([]float64, len(ys))
	for i, y := range ys {
		out[i] = math.NaN()
		if y > 0 {
			out[i] = math.Log(y)
		}
	}
	return out
}

// WithoutPartialStart returns Values without a first bucket that the
// source covers only in part: one with fewer than half the rows of the
// median bucket with rows (a meter whose first day holds 11 of 24 hourly
// readings). Model choice leaves such a bucket out: its value belongs to
// no full bucket and its error would count against every model.
func (d *SeriesData) WithoutPartialStart() []float64 {
	if len(d.Counts) < 3 || len(d.Counts) != len(d.Values) {
		return d.Values
	}
	var ns []int64
	for _, n := range d.Counts {
		if n > 0 {
			ns = append(ns, n)
		}
	}
	if len(ns) < 3 {
		return d.Values
	}
	slices.Sort(ns)
	if med := ns[len(ns)/2]; d.Counts[0] > 0 && 2*d.Counts[0] < med {
		return d.Values[1:]
	}
	return d.Values
}

// SeriesRow is one folded series as listed by ListSeries.
type SeriesRow struct {
	Tracker     *Tracker
	Key         string
	Points      int64
	FirstBucket time.Time
	LastBucket  time.Time
	FirstIndex  int64
	LastIndex   int64
	Ready       bool
	Lambda      float64 // the series' own lambda if tuned, else the tracker's
}

const listSeriesSQL = `
SELECT s.tracker_id, s.series_key, s.points,
       sidetrend.bucket_start(s.first_bucket, t.bucket, t.tz), sidetrend.bucket_start(s.folded_through, t.bucket, t.tz),
       s.first_bucket, s.folded_through, s.ready, coalesce(s.lambda, t.lambda, 0.95)
FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE s.folded_through IS NOT NULL AND s.first_bucket IS NOT NULL
  AND ($1::text IS NULL OR t.name = $1) AND ($2::text IS NULL OR s.series_key = $2)
ORDER BY t.name, s.series_key`

// ListSeries lists the series that have folded buckets, optionally of one
// tracker and one key, sorted by tracker name and key.
func ListSeries(ctx context.Context, q querier, tracker, key *string) ([]SeriesRow, error) {
	ts, err := LoadTrackers(ctx, q)
	if err != nil {
		return nil, err
	}
	rows, err := q.Query(ctx, listSeriesSQL, tracker, key)
	if err != nil {
		return nil, fmt.Errorf("list series: %w", err)
	}
	defer rows.Close()
	var out []SeriesRow
	for rows.Next() {
		var r SeriesRow
		var tid int32
		if err := rows.Scan(&tid, &r.Key, &r.Points, &r.FirstBucket, &r.LastBucket, &r.FirstIndex, &r.LastIndex, &r.Ready, &r.Lambda); err != nil {
			return nil, fmt.Errorf("list series: %w", err)
		}
		if r.Tracker = ts[int(tid)]; r.Tracker != nil {
			out = append(out, r)
		}
	}
	return out, rows.Err()
}
