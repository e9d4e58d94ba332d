package pgsync

import (
	"context"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/estimator"
)

// IssuedForecast is the forecast of one series as the sidecar served it:
// issued at bucket IssuedFor (the newest folded bucket N), with index l-1 of
// each slice the forecast for bucket N + l.
type IssuedForecast struct {
	TrackerID int
	SeriesKey string
	IssuedFor int64
	Yhat      []float64
	Lo95      []float64 // NaN while there is no interval
	Hi95      []float64
}

// ServedForecast is the IssuedForecast of a forecast just computed.
func ServedForecast(trackerID int, key string, issuedFor int64, fc *estimator.Forecast) IssuedForecast {
	return IssuedForecast{TrackerID: trackerID, SeriesKey: key, IssuedFor: issuedFor,
		Yhat: fc.Yhat, Lo95: fc.Lo95, Hi95: fc.Hi95}
}

// insertHistorySQL keeps the first forecast served for a (series, issue
// bucket, horizon): a replay that serves again at the same bucket does not
// rewrite what users saw. Trackers with history_buckets = 0 keep nothing.
const insertHistorySQL = `
INSERT INTO sidetrend.forecast_issues (tracker_id, series_key, issued_for, yhat, lo95, hi95)
SELECT $1::int, $2::text, $3::bigint, $4::float8[], $5::float8[], $6::float8[]
FROM sidetrend.trackers t WHERE t.id = $1::int AND t.history_buckets > 0
ON CONFLICT (tracker_id, series_key, issued_for) DO NOTHING`

// pruneHistorySQL keeps, per series, the forecasts issued in the newest
// history_buckets buckets: issued_for > newest - history_buckets.
const pruneHistorySQL = `
DELETE FROM sidetrend.forecast_issues h
USING (SELECT tid, key, max(issued) AS newest
       FROM unnest($1::int[], $2::text[], $3::bigint[]) AS u(tid, key, issued) GROUP BY 1, 2) q
JOIN sidetrend.trackers t ON t.id = q.tid
WHERE h.tracker_id = q.tid AND h.series_key = q.key AND h.issued_for <= q.newest - t.history_buckets`

// RecordHistory appends served forecasts to sidetrend.forecast_issues (read
// through the view sidetrend.forecast_history) in
// the caller's transaction and deletes, for each series it was given, the
// rows issued history_buckets or more buckets before its newest issue.
func RecordHistory(ctx context.Context, tx pgx.Tx, fcs []IssuedForecast) error {
	if len(fcs) == 0 {
		return nil
	}
	// One small pipelined INSERT per series: measured several times
	// cheaper than one statement that unnests and regroups every horizon.
	b := &pgx.Batch{}
	stids, skeys, sissued := make([]int32, len(fcs)), make([]string, len(fcs)), make([]int64, len(fcs))
	for i, f := range fcs {
		if len(f.Lo95) != len(f.Yhat) || len(f.Hi95) != len(f.Yhat) {
			return fmt.Errorf("record history of %q: %d forecasts but %d and %d interval bounds", f.SeriesKey, len(f.Yhat), len(f.Lo95), len(f.Hi95))
		}
		stids[i], skeys[i], sissued[i] = int32(f.TrackerID), f.SeriesKey, f.IssuedFor
		b.Queue(insertHistorySQL, int32(f.TrackerID), f.SeriesKey, f.IssuedFor, nullables(f.Yhat), nullables(f.Lo95), nullables(f.Hi95))
	}
	b.Queue(pruneHistorySQL, stids, skeys, sissued)
	if err := tx.SendBatch(ctx, b).Close(); err != nil {
		return fmt.Errorf("record forecast history: %w", err)
	}
	return nil
}
