-- Forecast history stored as the series rows store forecasts.
--
-- sidetrend.forecast_issues keeps each served forecast's standard errors
-- and its 95 % t quantile instead of the two bound arrays, as
-- sidetrend.series does since migration 00005: the drain then writes a
-- series row and its history row from the same arrays in one statement
-- (the history's rows come from the series update's RETURNING), and a
-- history row holds two arrays instead of three. sidetrend.forecast_history
-- forms lo95 and hi95 as sidetrend.forecasts does, with the same float8
-- operations in the same order as the estimator and NULL where t95 * se
-- would pass 1e300. Rows written before this migration keep their stored
-- bounds (se is NULL on them) and read as before; nothing is rewritten.

-- +goose Up
ALTER TABLE sidetrend.forecast_issues
    ADD COLUMN se float8[],
    ADD COLUMN t95 float8,
    ALTER COLUMN lo95 DROP NOT NULL,
    ALTER COLUMN hi95 DROP NOT NULL;
COMMENT ON COLUMN sidetrend.forecast_issues.se
    IS 'Standard error of each horizon''s served forecast; forecast_history forms yhat -+ t95 se. NULL on rows written before migration 00006, which store lo95 and hi95 instead.';
COMMENT ON COLUMN sidetrend.forecast_issues.t95
    IS 'Two-sided 95 % quantile of Student''s t the forecast was served with.';
COMMENT ON COLUMN sidetrend.forecast_issues.lo95
    IS 'Lower 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';
COMMENT ON COLUMN sidetrend.forecast_issues.hi95
    IS 'Upper 95 % bounds as stored before migration 00006 (NULL on newer rows, whose bounds forecast_history forms from se and t95).';

CREATE OR REPLACE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id, i.series_key, i.issued_for, f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat,
       CASE WHEN i.se IS NULL THEN f.lo95
            WHEN f.se <= 1e300 / i.t95 THEN f.yhat - i.t95 * f.se END AS lo95,
       CASE WHEN i.se IS NULL THEN f.hi95
            WHEN f.se <= 1e300 / i.t95 THEN f.yhat + i.t95 * f.se END AS hi95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.yhat, i.lo95, i.hi95, i.se) WITH ORDINALITY AS f(yhat, lo95, hi95, se, horizon);

-- +goose Down
-- Rows written since keep their bounds as the view formed them.
UPDATE sidetrend.forecast_issues i SET
    lo95 = ARRAY(SELECT CASE WHEN f.se <= 1e300 / i.t95 THEN f.yhat - i.t95 * f.se END
                 FROM unnest(i.yhat, i.se) WITH ORDINALITY AS f(yhat, se, h) ORDER BY f.h),
    hi95 = ARRAY(SELECT CASE WHEN f.se <= 1e300 / i.t95 THEN f.yhat + i.t95 * f.se END
                 FROM unnest(i.yhat, i.se) WITH ORDINALITY AS f(yhat, se, h) ORDER BY f.h)
WHERE i.se IS NOT NULL;
CREATE OR REPLACE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id, i.series_key, i.issued_for, f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat, f.lo95, f.hi95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.yhat, i.lo95, i.hi95) WITH ORDINALITY AS f(yhat, lo95, hi95, horizon);
ALTER TABLE sidetrend.forecast_issues
    ALTER COLUMN lo95 SET NOT NULL,
    ALTER COLUMN hi95 SET NOT NULL,
    DROP COLUMN se,
    DROP COLUMN t95;
COMMENT ON COLUMN sidetrend.forecast_issues.lo95 IS NULL;
COMMENT ON COLUMN sidetrend.forecast_issues.hi95 IS NULL;
