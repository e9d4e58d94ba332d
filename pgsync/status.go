package pgsync

import (
	"context"
	"fmt"
	"strconv"
	"strings"
	"time"
)

// Status is what `sidetrend status` shows: every tracker with its series
// counts, pending changes, rejects and newest errors.
type Status struct {
	At             time.Time       `json:"at"`                // the server's now()
	Trackers       []TrackerStatus `json:"trackers"`          // by name
	PendingChanges int64           `json:"pending_changes"`   // rows in sidetrend.changes
	LagSeconds     float64         `json:"lag_seconds"`       // age of the oldest pending change, 0 when none
	Rejects        int64           `json:"rejects"`           // rows in sidetrend.rejects
	Series         int64           `json:"series"`            // all series of all trackers
	ReadySeries    int64           `json:"ready_series"`      // of which serve estimates
	WarmingSeries  int64           `json:"warming_series"`    // of which do not yet
	ErrorSeries    int64           `json:"series_with_error"` // series whose last fold had an error
}

// TrackerStatus is one tracker in a Status.
type TrackerStatus struct {
	Name       string  `json:"name"`
	Source     string  `json:"source"` // schema-qualified table
	Bucket     string  `json:"bucket"` // interval text
	TZ         string  `json:"tz"`
	Agg        string  `json:"agg"`
	Model      string  `json:"model"` // e.g. "linear trend + period 7 (2 harmonics), lambda 0.95"
	Horizon    int     `json:"horizon"`
	Status     string  `json:"status"` // active or broken
	Backfilled bool    `json:"backfilled"`
	LastError  *string `json:"last_error"` // sidetrend.trackers.last_error

	Series     int64 `json:"series"`
	Ready      int64 `json:"ready"`
	Warming    int64 `json:"warming"`
	Rebuilding int64 `json:"rebuilding"` // series waiting for a replay
	WithError  int64 `json:"series_with_error"`
	Failed     int64 `json:"series_failed"` // of which failed to fold (they keep their last forecasts)

	PendingChanges int64      `json:"pending_changes"`
	LagSeconds     float64    `json:"lag_seconds"`
	Rejects        int64      `json:"rejects"`
	LastReject     *time.Time `json:"last_reject"`
	LastUpdate     *time.Time `json:"last_update"` // newest series write

	// LastSeriesError is the newest series.last_error of the tracker.
	LastSeriesError *SeriesError `json:"last_series_error"`
}

// SeriesError is a series' last_error with where and when.
type SeriesError struct {
	SeriesKey string     `json:"series_key"`
	Error     string     `json:"error"`
	At        *time.Time `json:"at"`
}

// statusTrackersSQL reads every tracker with its series counts, in one
// pass over sidetrend.series.
const statusTrackersSQL = `
SELECT t.id, t.name, t.source_name, t.bucket::text, t.tz, t.agg, t.degree, coalesce(t.period, 0), t.harmonics,
       t.lambda, t.burn_in, t.horizon, t.status, t.backfilled, t.last_error,
       coalesce(s.n, 0), coalesce(s.ready, 0), coalesce(s.rebuild, 0), coalesce(s.errors, 0), coalesce(s.failed, 0), s.updated
FROM sidetrend.trackers t
LEFT JOIN (
    SELECT tracker_id, count(*) AS n, count(*) FILTER (WHERE ready) AS ready,
           count(*) FILTER (WHERE rebuild) AS rebuild, count(*) FILTER (WHERE last_error IS NOT NULL) AS errors,
           count(*) FILTER (WHERE failed) AS failed,
           max(updated_at) AS updated
    FROM sidetrend.series GROUP BY tracker_id
) s ON s.tracker_id = t.id
ORDER BY t.name`

// statusChangesSQL counts the pending changes per tracker and the age of
// the oldest.
const statusChangesSQL = `
SELECT tracker_id, count(*), extract(epoch FROM now() - min(at))::float8
FROM sidetrend.changes GROUP BY tracker_id`

const statusRejectsSQL = `
SELECT tracker_id, count(*), max(at) FROM sidetrend.rejects GROUP BY tracker_id`

// statusSeriesErrorsSQL is the newest series error of each tracker.
const statusSeriesErrorsSQL = `
SELECT DISTINCT ON (tracker_id) tracker_id, series_key, last_error, coalesce(error_at, updated_at)
FROM sidetrend.series WHERE last_error IS NOT NULL
ORDER BY tracker_id, coalesce(error_at, updated_at) DESC NULLS LAST, series_key`

// LoadStatus reads the status of every tracker. The counts are exact and
// read the change log whole: it is meant for people and alerts, not for a
// tight loop (the metrics endpoint uses the cheap LoadLag instead).
func LoadStatus(ctx context.Context, q querier) (*Status, error) {
	st := &Status{Trackers: []TrackerStatus{}}
	if err := q.QueryRow(ctx, `SELECT now()`).Scan(&st.At); err != nil {
		return nil, fmt.Errorf("status: %w", err)
	}
	rows, err := q.Query(ctx, statusTrackersSQL)
	if err != nil {
		return nil, fmt.Errorf("status of trackers: %w", err)
	}
	byID := map[int]*TrackerStatus{}
	var ids []int
	for rows.Next() {
		var ts TrackerStatus
		var id, degree, harmonics, burnIn int
		var period float64
		var lambda *float64
		if err := rows.Scan(&id, &ts.Name, &ts.Source, &ts.Bucket, &ts.TZ, &ts.Agg, &degree, &period, &harmonics,
			&lambda, &burnIn, &ts.Horizon, &ts.Status, &ts.Backfilled, &ts.LastError,
			&ts.Series, &ts.Ready, &ts.Rebuilding, &ts.WithError, &ts.Failed, &ts.LastUpdate); err != nil {
			rows.Close()
			return nil, fmt.Errorf("status of trackers: %w", err)
		}
		ts.Warming = ts.Series - ts.Ready
		ts.Model = ModelString(degree, period, harmonics, lambda, burnIn)
		st.Trackers = append(st.Trackers, ts)
		ids = append(ids, id)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("status of trackers: %w", err)
	}
	for i, id := range ids {
		byID[id] = &st.Trackers[i]
	}

	rows, err = q.Query(ctx, statusChangesSQL)
	if err != nil {
		return nil, fmt.Errorf("status of the change log: %w", err)
	}
	for rows.Next() {
		var id int
		var n int64
		var lag float64
		if err := rows.Scan(&id, &n, &lag); err != nil {
			rows.Close()
			return nil, fmt.Errorf("status of the change log: %w", err)
		}
		st.PendingChanges += n
		st.LagSeconds = max(st.LagSeconds, lag)
		if ts := byID[id]; ts != nil {
			ts.PendingChanges, ts.LagSeconds = n, lag
		}
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("status of the change log: %w", err)
	}

	rows, err = q.Query(ctx, statusRejectsSQL)
	if err != nil {
		return nil, fmt.Errorf("status of rejects: %w", err)
	}
	for rows.Next() {
		var id int
		var n int64
		var last time.Time
		if err := rows.Scan(&id, &n, &last); err != nil {
			rows.Close()
			return nil, fmt.Errorf("status of rejects: %w", err)
		}
		st.Rejects += n
		if ts := byID[id]; ts != nil {
			ts.Rejects, ts.LastReject = n, &last
		}
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("status of rejects: %w", err)
	}

	rows, err = q.Query(ctx, statusSeriesErrorsSQL)
	if err != nil {
		return nil, fmt.Errorf("status of series errors: %w", err)
	}
	for rows.Next() {
		var id int
		var e SeriesError
		if err := rows.Scan(&id, &e.SeriesKey, &e.Error, &e.At); err != nil {
			rows.Close()
			return nil, fmt.Errorf("status of series errors: %w", err)
		}
		if ts := byID[id]; ts != nil {
			ts.LastSeriesError = &e
		}
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("status of series errors: %w", err)
	}

	for _, ts := range st.Trackers {
		st.Series += ts.Series
		st.ReadySeries += ts.Ready
		st.WarmingSeries += ts.Warming
		st.ErrorSeries += ts.WithError
	}
	return st, nil
}

// ModelString describes a tracker's model in a few words, e.g.
// "linear trend + period 7 (2 harmonics), lambda 0.95"; lambda nil means it
// is tuned automatically.
func ModelString(degree int, period float64, harmonics int, lambda *float64, burnIn int) string {
	var b strings.Builder
	switch degree {
	case 0:
		b.WriteString("local mean")
	case 1:
		b.WriteString("linear trend")
	case 2:
		b.WriteString("quadratic trend")
	default:
		fmt.Fprintf(&b, "degree %d trend", degree)
	}
	if period > 0 {
		fmt.Fprintf(&b, " + period %s (%d harmonic", strconv.FormatFloat(period, 'g', -1, 64), harmonics)
		if harmonics != 1 {
			b.WriteByte('s')
		}
		b.WriteByte(')')
	}
	if lambda == nil {
		b.WriteString(", lambda auto")
	} else {
		fmt.Fprintf(&b, ", lambda %s", strconv.FormatFloat(*lambda, 'g', -1, 64))
	}
	if burnIn > 0 {
		fmt.Fprintf(&b, ", burn-in %d", burnIn)
	}
	return b.String()
}

// Lag is the cheap health reading the metrics endpoint takes on every
// scrape.
type Lag struct {
	// OldestChange is the age of the oldest change still in the log, 0 when
	// the log is empty. The oldest is taken by id (the primary key), which
	// follows commit order closely enough for an alert.
	OldestChange time.Duration
	Rejects      int64 // rows in sidetrend.rejects
}

const lagSQL = `
SELECT coalesce((SELECT extract(epoch FROM now() - at)::float8 FROM sidetrend.changes ORDER BY id LIMIT 1), 0),
       (SELECT count(*) FROM sidetrend.rejects)`

// LoadLag reads the age of the oldest pending change and the number of
// rejects.
func LoadLag(ctx context.Context, q querier) (Lag, error) {
	var secs float64
	var l Lag
	if err := q.QueryRow(ctx, lagSQL).Scan(&secs, &l.Rejects); err != nil {
		return Lag{}, fmt.Errorf("read lag and rejects: %w", err)
	}
	l.OldestChange = time.Duration(max(secs, 0) * float64(time.Second))
	return l, nil
}

// SeriesInfo is one series as `sidetrend status --series` lists it.
type SeriesInfo struct {
	Tracker string `json:"tracker"`
	Key     string `json:"series_key"`
	// State is ready, warming, replay (waiting to be replayed) or failed
	// (its last fold failed; it keeps its last good forecasts).
	State     string     `json:"state"`
	Points    int64      `json:"points"`
	Through   *time.Time `json:"folded_through"` // start of the newest folded bucket
	UpdatedAt *time.Time `json:"updated_at"`
	LastError *string    `json:"last_error"`
	ErrorAt   *time.Time `json:"error_at"`
}

// seriesListSQL lists series by tracker and key: of tracker $1 (every
// tracker when empty), only those with an error when $2, at most $3.
const seriesListSQL = `
SELECT t.name, s.series_key,
       CASE WHEN s.failed THEN 'failed' WHEN s.rebuild THEN 'replay' WHEN s.ready THEN 'ready' ELSE 'warming' END,
       s.points, CASE WHEN s.folded_through IS NOT NULL THEN sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) END,
       s.updated_at, s.last_error, s.error_at
FROM sidetrend.series s JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE ($1 = '' OR t.name = $1) AND (NOT $2 OR s.last_error IS NOT NULL)
ORDER BY t.name, s.series_key
LIMIT $3`

// SeriesStatus lists at most limit series of tracker (all trackers when it
// is empty), only those with an error when onlyErrors. It also returns
// whether more were left out.
func SeriesStatus(ctx context.Context, q querier, tracker string, onlyErrors bool, limit int) ([]SeriesInfo, bool, error) {
	rows, err := q.Query(ctx, seriesListSQL, tracker, onlyErrors, int64(limit)+1)
	if err != nil {
		return nil, false, fmt.Errorf("list series: %w", err)
	}
	defer rows.Close()
	list := []SeriesInfo{}
	for rows.Next() {
		var s SeriesInfo
		if err := rows.Scan(&s.Tracker, &s.Key, &s.State, &s.Points, &s.Through, &s.UpdatedAt, &s.LastError, &s.ErrorAt); err != nil {
			return nil, false, fmt.Errorf("list series: %w", err)
		}
		list = append(list, s)
	}
	if err := rows.Err(); err != nil {
		return nil, false, fmt.Errorf("list series: %w", err)
	}
	if len(list) > limit {
		return list[:limit], true, nil
	}
	return list, false, nil
}
