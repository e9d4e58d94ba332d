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
// Like updateSeriesSQL it takes one flat float8[] per column, each issue's
// part at [off+1 : off+h], with NaN for NULL: one statement per batch.
const insertHistorySQL = `
INSERT INTO sidetrend.forecast_issues (tracker_id, series_key, issued_for, yhat, lo95, hi95)
SELECT q.tid, q.key, q.issued,
       array_replace(($6::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL),
       array_replace(($7::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL),
       array_replace(($8::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL)
FROM unnest($1::int[], $2::text[], $3::bigint[], $4::int[], $5::int[]) AS q(tid, key, issued, off, h)
JOIN sidetrend.trackers t ON t.id = q.tid
WHERE t.history_buckets > 0
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
// through the view sidetrend.forecast_history) in the caller's transaction
// and deletes, for each series it was given, the rows issued
// history_buckets or more buckets before its newest issue.
func RecordHistory(ctx context.Context, tx pgx.Tx, fcs []IssuedForecast) error {
	return recordHistory(ctx, tx, fcs, nil)
}

// recordHistory is RecordHistory that prunes only the series of the
// entries whose prune flag is set (all of them when prune is nil): the
// prune's index probe per series was a tenth of a drain's time in Postgres
// for series younger than history_buckets, which have nothing to delete.
func recordHistory(ctx context.Context, tx pgx.Tx, fcs []IssuedForecast, prune []bool) error {
	if len(fcs) == 0 {
		return nil
	}
	n := len(fcs)
	tids, keys, issued := make([]int32, n), make([]string, n), make([]int64, n)
	offs, hs := make([]int32, n), make([]int32, n)
	// Never nil: a nil slice is sent as NULL, not as an empty array.
	h := len(fcs[0].Yhat)
	yhat, lo, hi := make([]float64, 0, h*n), make([]float64, 0, h*n), make([]float64, 0, h*n)
	for i, f := range fcs {
		if len(f.Lo95) != len(f.Yhat) || len(f.Hi95) != len(f.Yhat) {
			return fmt.Errorf("record history of %q: %d forecasts but %d and %d interval bounds", f.SeriesKey, len(f.Yhat), len(f.Lo95), len(f.Hi95))
		}
		tids[i], keys[i], issued[i] = int32(f.TrackerID), f.SeriesKey, f.IssuedFor
		offs[i], hs[i] = int32(len(yhat)), int32(len(f.Yhat))
		yhat, lo, hi = appendFinite(yhat, f.Yhat), appendFinite(lo, f.Lo95), appendFinite(hi, f.Hi95)
	}
	b := &pgx.Batch{}
	b.Queue(insertHistorySQL, tids, keys, issued, offs, hs, yhat, lo, hi)
	if prune != nil {
		ptids, pkeys, pissued := tids[:0:0], keys[:0:0], issued[:0:0]
		for i, p := range prune {
			if p {
				ptids, pkeys, pissued = append(ptids, tids[i]), append(pkeys, keys[i]), append(pissued, issued[i])
			}
		}
		tids, keys, issued = ptids, pkeys, pissued
	}
	if len(tids) > 0 {
		b.Queue(pruneHistorySQL, tids, keys, issued)
	}
	if err := tx.SendBatch(ctx, b).Close(); err != nil {
		return fmt.Errorf("record forecast history: %w", err)
	}
	return nil
}
