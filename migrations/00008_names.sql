-- Names of our own for the forecast columns, and tracker names and bucket
-- start times in the history.
--
-- 1. Columns renamed, in storage and in the views (contract names):
--      point forecast        yhat     -> forecast
--      cumulative forecast   cum_yhat -> cum_forecast
--      80 % interval         lo80, hi80 -> lower80, upper80
--      95 % interval         lo95, hi95 -> lower95, upper95
--      cumulative 95 %       cum_lo95, cum_hi95 -> cum_lower95, cum_upper95
--    Tables (sidetrend.series, sidetrend.forecast_issues, sidetrend.surprises)
--    and sidetrend.forecasts are renamed in place with RENAME COLUMN: a view
--    keeps its body, so whatever an earlier migration put in it (such as
--    the row filter of migration 00007) stays.
-- 2. sidetrend.forecast_history gets the tracker's name (column tracker) and
--    issued_for becomes the start of the issue bucket (timestamptz) instead
--    of its number. A column's type cannot change in place, so the view is
--    dropped and created again, and with it sidetrend.accuracy_by_horizon,
--    which read bucket numbers from it and now reads the stored issues
--    directly. Both bodies are otherwise as before.
-- 3. sidetrend.rejected_rows: sidetrend.rejects (a table, unchanged) with the
--    tracker's name.
--
-- Row visibility: migration 00007 shows a reader only the trackers whose
-- source table the reader may SELECT, with the filter
--     WHERE sidetrend.may_read(t.source, t.owner)
-- (t is sidetrend.trackers). The views created here carry that filter
-- themselves, so recreating them does not drop it. sidetrend.forecasts is
-- created again after its columns are renamed, with the same body in the
-- new names. Their
-- grants are copied from the views they replace; sidetrend.rejected_rows
-- gets those of sidetrend.forecasts.

-- +goose Up
ALTER TABLE sidetrend.series RENAME COLUMN yhat TO forecast;
ALTER TABLE sidetrend.series RENAME COLUMN cum_yhat TO cum_forecast;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN yhat TO forecast;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN lo95 TO lower95;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN hi95 TO upper95;
ALTER TABLE sidetrend.surprises RENAME COLUMN yhat TO forecast;
ALTER TABLE sidetrend.surprises RENAME COLUMN lo95 TO lower95;
ALTER TABLE sidetrend.surprises RENAME COLUMN hi95 TO upper95;

ALTER VIEW sidetrend.forecasts RENAME COLUMN yhat TO forecast;
ALTER VIEW sidetrend.forecasts RENAME COLUMN lo80 TO lower80;
ALTER VIEW sidetrend.forecasts RENAME COLUMN hi80 TO upper80;
ALTER VIEW sidetrend.forecasts RENAME COLUMN lo95 TO lower95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN hi95 TO upper95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_yhat TO cum_forecast;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_lo95 TO cum_lower95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_hi95 TO cum_upper95;

CREATE OR REPLACE VIEW sidetrend.forecasts AS
SELECT t.name AS tracker,
       s.series_key,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(s.folded_through + f.horizon, t.bucket, t.tz) AS period_start,
       f.forecast,
       CASE WHEN f.se <= 1e300 / s.t80 THEN f.forecast - s.t80 * f.se END AS lower80,
       CASE WHEN f.se <= 1e300 / s.t80 THEN f.forecast + s.t80 * f.se END AS upper80,
       CASE WHEN f.se <= 1e300 / s.t95 THEN f.forecast - s.t95 * f.se END AS lower95,
       CASE WHEN f.se <= 1e300 / s.t95 THEN f.forecast + s.t95 * f.se END AS upper95,
       f.cum_forecast,
       CASE WHEN f.cum_se <= 1e300 / s.t95 THEN f.cum_forecast - s.t95 * f.cum_se END AS cum_lower95,
       CASE WHEN f.cum_se <= 1e300 / s.t95 THEN f.cum_forecast + s.t95 * f.cum_se END AS cum_upper95,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
CROSS JOIN LATERAL unnest(s.forecast, s.se, s.cum_forecast, s.cum_se)
    WITH ORDINALITY AS f(forecast, se, cum_forecast, cum_se, horizon)
WHERE s.ready AND sidetrend.may_read(t.source, t.owner);

-- Grants of the views dropped below, to put back on their successors.
CREATE TEMP TABLE sidetrend_acl ON COMMIT DROP AS
SELECT c.relname AS from_view, a.grantee, a.privilege_type, a.is_grantable
FROM pg_class c
CROSS JOIN LATERAL aclexplode(c.relacl) a
WHERE c.relnamespace = 'sidetrend'::regnamespace
  AND c.relname IN ('forecast_history', 'accuracy_by_horizon', 'forecasts')
  AND a.grantee <> c.relowner;

DROP VIEW sidetrend.accuracy_by_horizon;
DROP VIEW sidetrend.forecast_history;

CREATE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id,
       t.name AS tracker,
       i.series_key,
       sidetrend.bucket_start(i.issued_for, t.bucket, t.tz) AS issued_for,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.forecast,
       CASE WHEN i.se IS NULL THEN f.lower95
            WHEN f.se <= 1e300 / i.t95 THEN f.forecast - i.t95 * f.se END AS lower95,
       CASE WHEN i.se IS NULL THEN f.upper95
            WHEN f.se <= 1e300 / i.t95 THEN f.forecast + i.t95 * f.se END AS upper95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.forecast, i.lower95, i.upper95, i.se)
    WITH ORDINALITY AS f(forecast, lower95, upper95, se, horizon)
WHERE sidetrend.may_read(t.source, t.owner);

CREATE VIEW sidetrend.accuracy_by_horizon AS
SELECT t.name AS tracker,
       i.series_key,
       f.horizon::int AS horizon,
       count(*) AS n,
       avg(abs(a.value - f.forecast)) AS mae,
       sqrt(avg((a.value - f.forecast) * (a.value - f.forecast))) AS rmse,
       (count(*) FILTER (WHERE a.value BETWEEN b.lower95 AND b.upper95))::float8
           / nullif(count(*) FILTER (WHERE b.lower95 IS NOT NULL AND b.upper95 IS NOT NULL), 0) AS coverage95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
JOIN sidetrend.series s ON s.tracker_id = i.tracker_id AND s.series_key = i.series_key
CROSS JOIN LATERAL unnest(i.forecast, i.lower95, i.upper95, i.se)
    WITH ORDINALITY AS f(forecast, lower95, upper95, se, horizon)
CROSS JOIN LATERAL (
    SELECT CASE WHEN i.se IS NULL THEN f.lower95
                WHEN f.se <= 1e300 / i.t95 THEN f.forecast - i.t95 * f.se END AS lower95,
           CASE WHEN i.se IS NULL THEN f.upper95
                WHEN f.se <= 1e300 / i.t95 THEN f.forecast + i.t95 * f.se END AS upper95
) b
LEFT JOIN sidetrend.points p
    ON p.tracker_id = i.tracker_id AND p.series_key = i.series_key AND p.bucket = i.issued_for + f.horizon
CROSS JOIN LATERAL (
    SELECT coalesce(sidetrend.point_value(t.agg, p.n, p.sum, p.min, p.max, p.last_v),
                    CASE WHEN t.empty = 'zero' THEN 0::float8 END) AS value
) a
WHERE i.issued_for + f.horizon <= s.folded_through
  AND f.forecast IS NOT NULL
  AND a.value IS NOT NULL
  AND sidetrend.may_read(t.source, t.owner)
GROUP BY t.name, i.series_key, f.horizon;

CREATE VIEW sidetrend.rejected_rows AS
SELECT r.id, t.name AS tracker, r.reason, r.row_data, r.at, r.tracker_id
FROM sidetrend.rejects r
JOIN sidetrend.trackers t ON t.id = r.tracker_id
WHERE sidetrend.may_read(t.source, t.owner);

-- +goose StatementBegin
DO $grants$
DECLARE
    g record;
BEGIN
    FOR g IN SELECT v.to_view, a.grantee, a.privilege_type, a.is_grantable
             FROM sidetrend_acl a
             JOIN (VALUES ('forecast_history', 'forecast_history'),
                          ('accuracy_by_horizon', 'accuracy_by_horizon'),
                          ('forecasts', 'rejected_rows')) AS v(from_view, to_view)
               ON v.from_view = a.from_view LOOP
        EXECUTE format('GRANT %s ON sidetrend.%I TO %s%s', g.privilege_type, g.to_view,
                       CASE WHEN g.grantee = 0 THEN 'PUBLIC' ELSE quote_ident(pg_get_userbyid(g.grantee)) END,
                       CASE WHEN g.is_grantable THEN ' WITH GRANT OPTION' ELSE '' END);
    END LOOP;
END
$grants$;
-- +goose StatementEnd

COMMENT ON COLUMN sidetrend.series.se
    IS 'Standard error of each horizon''s forecast; the forecasts view forms forecast -+ t80 se and forecast -+ t95 se.';
COMMENT ON COLUMN sidetrend.series.cum_se
    IS 'Standard error of each cumulative forecast; cum_forecast -+ t95 cum_se is its 95 % interval.';
COMMENT ON COLUMN sidetrend.forecast_issues.se
    IS 'Standard error of each horizon''s served forecast; forecast_history forms forecast -+ t95 se. NULL on rows written before migration 00006, which store lower95 and upper95 instead.';
COMMENT ON COLUMN sidetrend.forecast_issues.lower95
    IS 'Lower 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';
COMMENT ON COLUMN sidetrend.forecast_issues.upper95
    IS 'Upper 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';
COMMENT ON TABLE sidetrend.surprises
    IS 'Surprises found while folding buckets: outside95 (actual outside the 95 % interval issued one step earlier; z = (actual - forecast) / se) and slope_turn (the slope direction changed from up to down or back; z = slope_t). Each is also sent as JSON with pg_notify(''sidetrend_surprise'').';
COMMENT ON VIEW sidetrend.forecast_history
    IS 'Forecasts as the sidecar served them: issued_for is the start of the newest folded bucket N they were issued at, horizon h targets bucket N + h starting at period_start. Kept for trackers.history_buckets buckets of issue. Shows only trackers whose source table the reader may SELECT.';
COMMENT ON VIEW sidetrend.accuracy_by_horizon
    IS 'Served forecasts (sidetrend.forecast_history) against the actual bucket values, per series and horizon: n forecasts whose bucket has been folded, mae, rmse, and coverage95 = share of actuals inside the 95 % interval. Under empty = zero a bucket without rows counts as 0; under gap it is left out.';
COMMENT ON VIEW sidetrend.rejected_rows
    IS 'sidetrend.rejects with the tracker''s name: source rows that were not folded in (NULL, NaN, infinite or out-of-range time or value), with the reason. Shows only trackers whose source table the reader may SELECT.';

-- +goose Down
CREATE TEMP TABLE sidetrend_acl ON COMMIT DROP AS
SELECT c.relname AS from_view, a.grantee, a.privilege_type, a.is_grantable
FROM pg_class c
CROSS JOIN LATERAL aclexplode(c.relacl) a
WHERE c.relnamespace = 'sidetrend'::regnamespace
  AND c.relname IN ('forecast_history', 'accuracy_by_horizon')
  AND a.grantee <> c.relowner;

DROP VIEW sidetrend.rejected_rows;
DROP VIEW sidetrend.accuracy_by_horizon;
DROP VIEW sidetrend.forecast_history;

ALTER VIEW sidetrend.forecasts RENAME COLUMN forecast TO yhat;
ALTER VIEW sidetrend.forecasts RENAME COLUMN lower80 TO lo80;
ALTER VIEW sidetrend.forecasts RENAME COLUMN upper80 TO hi80;
ALTER VIEW sidetrend.forecasts RENAME COLUMN lower95 TO lo95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN upper95 TO hi95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_forecast TO cum_yhat;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_lower95 TO cum_lo95;
ALTER VIEW sidetrend.forecasts RENAME COLUMN cum_upper95 TO cum_hi95;

ALTER TABLE sidetrend.series RENAME COLUMN forecast TO yhat;
ALTER TABLE sidetrend.series RENAME COLUMN cum_forecast TO cum_yhat;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN forecast TO yhat;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN lower95 TO lo95;
ALTER TABLE sidetrend.forecast_issues RENAME COLUMN upper95 TO hi95;
ALTER TABLE sidetrend.surprises RENAME COLUMN forecast TO yhat;
ALTER TABLE sidetrend.surprises RENAME COLUMN lower95 TO lo95;
ALTER TABLE sidetrend.surprises RENAME COLUMN upper95 TO hi95;

-- The bodies of migration 00006 (forecast_history) and 00004
-- (accuracy_by_horizon), with the row filter of migration 00007.
CREATE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id, i.series_key, i.issued_for, f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat,
       CASE WHEN i.se IS NULL THEN f.lo95
            WHEN f.se <= 1e300 / i.t95 THEN f.yhat - i.t95 * f.se END AS lo95,
       CASE WHEN i.se IS NULL THEN f.hi95
            WHEN f.se <= 1e300 / i.t95 THEN f.yhat + i.t95 * f.se END AS hi95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.yhat, i.lo95, i.hi95, i.se) WITH ORDINALITY AS f(yhat, lo95, hi95, se, horizon)
WHERE sidetrend.may_read(t.source, t.owner);

CREATE VIEW sidetrend.accuracy_by_horizon AS
SELECT t.name AS tracker,
       h.series_key,
       h.horizon,
       count(*) AS n,
       avg(abs(a.value - h.yhat)) AS mae,
       sqrt(avg((a.value - h.yhat) * (a.value - h.yhat))) AS rmse,
       (count(*) FILTER (WHERE a.value BETWEEN h.lo95 AND h.hi95))::float8
           / nullif(count(*) FILTER (WHERE h.lo95 IS NOT NULL AND h.hi95 IS NOT NULL), 0) AS coverage95
FROM sidetrend.forecast_history h
JOIN sidetrend.trackers t ON t.id = h.tracker_id
JOIN sidetrend.series s ON s.tracker_id = h.tracker_id AND s.series_key = h.series_key
LEFT JOIN sidetrend.points p
    ON p.tracker_id = h.tracker_id AND p.series_key = h.series_key AND p.bucket = h.issued_for + h.horizon
CROSS JOIN LATERAL (
    SELECT coalesce(sidetrend.point_value(t.agg, p.n, p.sum, p.min, p.max, p.last_v),
                    CASE WHEN t.empty = 'zero' THEN 0::float8 END) AS value
) a
WHERE h.issued_for + h.horizon <= s.folded_through
  AND h.yhat IS NOT NULL
  AND a.value IS NOT NULL
  AND sidetrend.may_read(t.source, t.owner)
GROUP BY t.name, h.series_key, h.horizon;

-- +goose StatementBegin
DO $grants$
DECLARE
    g record;
BEGIN
    FOR g IN SELECT * FROM sidetrend_acl LOOP
        EXECUTE format('GRANT %s ON sidetrend.%I TO %s%s', g.privilege_type, g.from_view,
                       CASE WHEN g.grantee = 0 THEN 'PUBLIC' ELSE quote_ident(pg_get_userbyid(g.grantee)) END,
                       CASE WHEN g.is_grantable THEN ' WITH GRANT OPTION' ELSE '' END);
    END LOOP;
END
$grants$;
-- +goose StatementEnd

COMMENT ON COLUMN sidetrend.series.se IS 'Standard error of each horizon''s forecast; the forecasts view forms yhat -+ t80 se and yhat -+ t95 se.';
COMMENT ON COLUMN sidetrend.series.cum_se IS 'Standard error of each cumulative forecast; cum_yhat -+ t95 cum_se is its 95 % interval.';
COMMENT ON COLUMN sidetrend.forecast_issues.se
    IS 'Standard error of each horizon''s served forecast; forecast_history forms yhat -+ t95 se. NULL on rows written before migration 00006, which store lo95 and hi95 instead.';
COMMENT ON COLUMN sidetrend.forecast_issues.lo95
    IS 'Lower 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';
COMMENT ON COLUMN sidetrend.forecast_issues.hi95
    IS 'Upper 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';
COMMENT ON TABLE sidetrend.surprises
    IS 'Surprises found while folding buckets: outside95 (actual outside the 95 % interval issued one step earlier; z = (actual - yhat) / se) and slope_turn (the slope direction changed from up to down or back; z = slope_t). Each is also sent as JSON with pg_notify(''sidetrend_surprise'').';
COMMENT ON VIEW sidetrend.forecast_history
    IS 'Forecasts as the sidecar served them: issued_for is the newest folded bucket N they were issued at, horizon h targets bucket N + h starting at period_start. Kept for trackers.history_buckets buckets of issue.';
COMMENT ON VIEW sidetrend.accuracy_by_horizon
    IS 'Served forecasts (sidetrend.forecast_history) against the actual bucket values, per series and horizon: n forecasts whose bucket has been folded, mae, rmse, and coverage95 = share of actuals inside the 95 % interval. Under empty = zero a bucket without rows counts as 0; under gap it is left out.';
