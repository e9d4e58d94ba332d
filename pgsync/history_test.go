package pgsync

import (
	"context"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/estimator"
)

// IssuedForecast is the forecast of one series as served: issued at bucket
// IssuedFor (the newest folded bucket N), with index l-1 of each slice the
// forecast for bucket N + l and its standard error; T95 is the 95 % t
// quantile it was served with (NaN while there is no interval). The history
// tests record forecasts computed offline with it.
type IssuedForecast struct {
	TrackerID int
	SeriesKey string
	IssuedFor int64
	Forecast  []float64
	SE        []float64 // NaN while there is no interval
	T95       float64
}

// ServedForecast is the IssuedForecast of a forecast just computed.
func ServedForecast(trackerID int, key string, issuedFor int64, fc *estimator.Forecast) IssuedForecast {
	return IssuedForecast{TrackerID: trackerID, SeriesKey: key, IssuedFor: issuedFor,
		Forecast: fc.Forecast, SE: fc.SE, T95: fc.T95}
}

// recordHistorySQL feeds historyTailSQL, the drain's own insert and prune,
// from parameters: each issue's part of the flat arrays is [off+1 : off+h],
// NaN for NULL.
var recordHistorySQL = `
WITH issued AS (
    SELECT q.tid, q.key, q.issued_for,
           array_replace(($6::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) AS forecast,
           array_replace(($7::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) AS se,
           nullif(q.t95, 'NaN') AS t95, true AS prune
    FROM unnest($1::int[], $2::text[], $3::bigint[], $4::int[], $5::int[], $8::float8[])
         AS q(tid, key, issued_for, off, h, t95)
)` + historyTailSQL

// RecordHistory records served forecasts through historyTailSQL in the
// caller's transaction and deletes, for each series it was given, the rows
// issued history_buckets or more buckets before its newest issue.
func RecordHistory(ctx context.Context, tx pgx.Tx, fcs []IssuedForecast) error {
	if len(fcs) == 0 {
		return nil
	}
	n := len(fcs)
	tids, keys, issued := make([]int32, n), make([]string, n), make([]int64, n)
	offs, hs, t95 := make([]int32, n), make([]int32, n), make([]float64, n)
	// Never nil: a nil slice is sent as NULL, not as an empty array.
	forecast, se := make([]float64, 0, len(fcs[0].Forecast)*n), make([]float64, 0, len(fcs[0].Forecast)*n)
	for i, f := range fcs {
		if len(f.SE) != len(f.Forecast) {
			return fmt.Errorf("record history of %q: %d forecasts but %d standard errors", f.SeriesKey, len(f.Forecast), len(f.SE))
		}
		tids[i], keys[i], issued[i] = int32(f.TrackerID), f.SeriesKey, f.IssuedFor
		offs[i], hs[i], t95[i] = int32(len(forecast)), int32(len(f.Forecast)), finiteOrNaN(f.T95)
		forecast, se = appendFinite(forecast, f.Forecast), appendFinite(se, f.SE)
	}
	if _, err := tx.Exec(ctx, recordHistorySQL, tids, keys, issued, offs, hs, forecast, se, t95); err != nil {
		return fmt.Errorf("record forecast history: %w", err)
	}
	return nil
}
