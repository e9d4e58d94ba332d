package pgsync

// historyTailSQL is the statement tail that records served forecasts in
// sidetrend.forecast_issues (read through the view sidetrend.forecast_history)
// and prunes old ones, given a relation issued(tid, key, issued_for, forecast,
// se, t95, prune) defined before it in a WITH list: writeSeriesSQL defines
// it as the series update's RETURNING. The bounds are formed by the view,
// forecast -+ t95 se.
//
// The insert keeps the first forecast served for a (series, issue bucket):
// a replay that serves again at the same bucket does not rewrite what users
// saw. Trackers with history_buckets = 0 keep nothing. The prune keeps, for
// each series with prune set, the forecasts issued in its newest
// history_buckets buckets: issued_for > newest - history_buckets. (The
// prune's statement does not see the row the insert adds, which is the
// newest and never pruned.)
const historyTailSQL = `, recorded AS (
    INSERT INTO sidetrend.forecast_issues (tracker_id, series_key, issued_for, forecast, se, t95)
    SELECT i.tid, i.key, i.issued_for, i.forecast, i.se, i.t95
    FROM issued i JOIN sidetrend.trackers t ON t.id = i.tid
    WHERE t.history_buckets > 0
    ON CONFLICT (tracker_id, series_key, issued_for) DO NOTHING
)
DELETE FROM sidetrend.forecast_issues h
USING (SELECT tid, key, max(issued_for) AS newest FROM issued WHERE prune GROUP BY 1, 2) q
JOIN sidetrend.trackers t ON t.id = q.tid
WHERE h.tracker_id = q.tid AND h.series_key = q.key AND h.issued_for <= q.newest - t.history_buckets`
