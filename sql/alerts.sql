-- Alert recipes: what surprised us, which trends turned, which series'
-- forecasts stopped being trustworthy, which series went quiet.
--
-- Each recipe starts with "-- recipe: NAME"; TestAlertRecipes
-- (pgsync/analyst_test.go) runs them all. They read sidetrend's views and
-- the surprises log, so a role with sidetrend_reader can run them.
--
-- Surprises are recorded by the sidecar as it folds each bucket:
--   outside95   the actual fell outside the 95 % interval forecast one bucket
--               earlier; z = (actual - forecast) / se (|z| > about 2 by definition)
--   slope_turn  the trend's direction (up or down when |slope_t| >= 2) turned;
--               flat readings in between do not count, so up, flat, down is
--               one turn and up, flat, up is none; z = slope_t
-- By chance alone about 1 bucket in 20 falls outside a 95 % interval (when
-- the model's assumptions hold), so with many series some outside95 events
-- every day are expected: rank by |z| and look at the largest.
--
-- Every surprise is also announced when the sidecar's transaction commits,
-- on the channel sidetrend_surprise, as a JSON array of ids:
--     LISTEN sidetrend_surprise;
--     -- payload: [{"id": 812, "tracker_id": 3, "kind": "outside95"}, ...]
-- Any role may LISTEN on any channel, so the payload carries no value, key
-- or name: read the rest from sidetrend.surprises by id, which shows each
-- role only the trackers whose source table it may read.

-- recipe: surprised_today
-- Which series surprised us today (detected since local midnight)?
SELECT tracker, series_key, kind, period_start, actual, forecast, lower95, upper95, round(z::numeric, 2) AS z, direction
FROM sidetrend.surprises
WHERE detected_at >= date_trunc('day', now())
ORDER BY abs(z) DESC NULLS LAST, tracker, series_key;

-- recipe: surprises_per_tracker
-- How many surprises per tracker and kind over the last 7 days, against the
-- number of series (about 5 % of folded buckets fall outside by chance).
SELECT s.tracker, s.kind, count(*) AS surprises,
       (SELECT count(*) FROM sidetrend.series_status st WHERE st.tracker = s.tracker) AS series
FROM sidetrend.surprises s
WHERE s.detected_at >= now() - interval '7 days'
GROUP BY s.tracker, s.kind
ORDER BY s.tracker, s.kind;

-- recipe: trend_now
-- Is this growing? Series whose trend is up or down now, steepest first
-- (slope_pct: slope per bucket as a fraction of the level).
SELECT tracker, series_key, as_of, level, slope, round(slope_t::numeric, 1) AS slope_t,
       round((100 * slope_pct)::numeric, 2) AS pct_per_bucket, direction
FROM sidetrend.slopes
WHERE direction <> 'flat'
ORDER BY abs(slope_t) DESC, tracker, series_key;

-- recipe: poorly_calibrated
-- Forecasts to distrust: series with enough scored errors whose 95 %
-- intervals held less than 85 % of the actuals (the model is missing
-- something: a change of level, a season it does not have, outliers), or
-- whose errors lean one way (|bias| above a quarter of the RMSE).
SELECT tracker, series_key, n_errors, round(coverage95::numeric, 3) AS coverage95,
       rmse, bias, round(mape::numeric, 4) AS mape_fraction
FROM sidetrend.accuracy
WHERE n_errors >= 30 AND (coverage95 < 0.85 OR abs(bias) > 0.25 * rmse)
ORDER BY coverage95, tracker, series_key;

-- recipe: gone_quiet
-- Series that stopped reporting: the newest folded bucket is more than
-- three buckets behind the newest of their tracker.
SELECT s.tracker, s.series_key, s.last_bucket, m.newest
FROM sidetrend.series_status s
JOIN (SELECT tracker, max(last_bucket) AS newest FROM sidetrend.series_status GROUP BY tracker) m USING (tracker)
JOIN sidetrend.tracker_settings ts USING (tracker)
WHERE s.last_bucket < m.newest - 3 * ts.bucket
ORDER BY s.tracker, s.last_bucket, s.series_key;
