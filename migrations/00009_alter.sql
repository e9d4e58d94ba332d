-- Series set aside on their own, trackers changed in place.
--
-- 1. A series whose fold fails (a value or a gap the estimator refuses, a
--    panic) no longer sets its whole tracker aside: its row keeps its last
--    good state and forecasts, last_error and error_at say what failed and
--    when, and failed makes the next change or sidetrend.rebuild replay it
--    from all its points (pgsync/guard.go, failSeriesSQL).
-- 2. sidetrend.alter_tracker(name, ...) changes a tracker's settings in
--    place, in one transaction: horizon, model (degree, period, harmonics),
--    lambda, burn-in, history kept, span, and the bucket width or time zone.
--    A change of the model, lambda, burn-in or horizon marks every series
--    for a replay from its stored points (the sidecar replays them after
--    the commit; the points, and so every observation, are kept). A change
--    of the bucket width or zone renumbers the buckets: the capture code is
--    installed again (install_capture) and the source is read again
--    (the tracker's backfill function) in the same transaction; the
--    forecast history, whose bucket numbers the new calendar cannot read,
--    is deleted. A span change installs the capture code again.
--    settings_version counts the changes: a drain batch holds the rows of
--    the trackers it folds FOR SHARE and reloads its cached settings when
--    the version moved (pgsync, Syncer.checkSettings).
-- 3. Forecasts past the data's own span carry a caution: sidetrend.forecasts
--    gets data_buckets (the buckets from the series' first to its newest
--    folded bucket), reach (horizon / data_buckets) and caution (NULL, or
--    why the forecast is an extrapolation to read with care). series_status
--    shows failed series with their error. Columns are added at the end
--    (CREATE OR REPLACE VIEW keeps the grants and the row filter).
-- 4. Every column of every view has a COMMENT.

-- +goose Up
ALTER TABLE sidetrend.series
    ADD COLUMN IF NOT EXISTS failed boolean NOT NULL DEFAULT false,
    ADD COLUMN IF NOT EXISTS error_at timestamptz;
COMMENT ON COLUMN sidetrend.series.failed
    IS 'The last fold of this series failed (last_error says why): the row holds its last good state and forecasts, and the next change or sidetrend.rebuild replays it from its points.';
COMMENT ON COLUMN sidetrend.series.error_at IS 'When last_error was written; NULL when the last fold had no error.';
COMMENT ON COLUMN sidetrend.series.last_error
    IS 'The error of the last fold: a bucket the estimator skipped, a state that did not decode (then replayed), or a fold that failed (failed is true).';

ALTER TABLE sidetrend.trackers ADD COLUMN IF NOT EXISTS settings_version int NOT NULL DEFAULT 0;
COMMENT ON COLUMN sidetrend.trackers.settings_version
    IS 'Counts the changes made by sidetrend.alter_tracker; the sidecar reloads its copy of the settings when it moves.';

-- (check_settings, the checks of track() that alter_tracker repeats, is
-- defined in 00007.)


-- _alter_tracker_as changes tracker name's settings for caller (see 2.
-- above). An argument left NULL keeps its setting; period => 0 removes the
-- season (and its harmonics); lambda_auto => true lets the sidecar choose
-- lambda. It returns a sentence saying what changed and what follows.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._alter_tracker_as(
    caller          name,
    name            text,
    horizon         int,
    degree          int,
    period          float8,
    harmonics       int,
    lambda          float8,
    lambda_auto     boolean,
    burn_in         int,
    history_buckets int,
    span            interval,
    tz              text,
    bucket          interval
) RETURNS text
LANGUAGE plpgsql SECURITY DEFINER SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t          sidetrend.trackers := sidetrend.find_tracker(_alter_tracker_as.name);
    n          sidetrend.trackers;
    v_timeout  text := current_setting('lock_timeout');
    v_changed  text[] := '{}';
    v_replay   boolean;
    v_reread   boolean;
    v_capture  boolean;
    v_series   bigint;
    v_points   bigint;
    v_issues   bigint := 0;
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'alter', true);
    IF t.status <> 'active' THEN
        RAISE EXCEPTION 'tracker "%" is %: %', t.name, t.status, t.last_error
            USING ERRCODE = 'object_not_in_prerequisite_state',
                  HINT = format('Resume it first with SELECT sidetrend.rebuild(%L), then change it.', t.name);
    END IF;
    IF _alter_tracker_as.lambda IS NOT NULL AND coalesce(_alter_tracker_as.lambda_auto, false) THEN
        RAISE EXCEPTION 'lambda => % and lambda_auto => true contradict each other', _alter_tracker_as.lambda
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass one of them: a fixed forgetting factor, or lambda_auto => true.';
    END IF;
    n := t;
    n.horizon := coalesce(_alter_tracker_as.horizon, t.horizon);
    n.degree := coalesce(_alter_tracker_as.degree, t.degree);
    IF _alter_tracker_as.period = 0 THEN
        n.period := NULL;
        n.harmonics := coalesce(nullif(_alter_tracker_as.harmonics, 0), 0);
    ELSE
        n.period := coalesce(_alter_tracker_as.period, t.period);
        n.harmonics := coalesce(_alter_tracker_as.harmonics,
                                CASE WHEN t.period IS NULL AND _alter_tracker_as.period IS NOT NULL THEN 1 ELSE t.harmonics END);
    END IF;
    n.lambda := CASE WHEN coalesce(_alter_tracker_as.lambda_auto, false) THEN NULL ELSE coalesce(_alter_tracker_as.lambda, t.lambda) END;
    n.burn_in := coalesce(_alter_tracker_as.burn_in, t.burn_in);
    n.history_buckets := coalesce(_alter_tracker_as.history_buckets, t.history_buckets);
    n.tz := coalesce(_alter_tracker_as.tz, t.tz);
    n.bucket := coalesce(_alter_tracker_as.bucket, t.bucket);
    -- A span given or kept; a wider bucket may need a wider span.
    n.span := coalesce(_alter_tracker_as.span, greatest(t.span, n.bucket));
    PERFORM sidetrend.check_settings(n.bucket, n.tz, n.degree, n.period, n.harmonics, n.lambda, n.horizon,
                                     n.burn_in, n.history_buckets, n.span);

    IF n.horizon IS DISTINCT FROM t.horizon THEN v_changed := v_changed || format('horizon %s -> %s', t.horizon, n.horizon); END IF;
    IF n.degree IS DISTINCT FROM t.degree THEN v_changed := v_changed || format('degree %s -> %s', t.degree, n.degree); END IF;
    IF n.period IS DISTINCT FROM t.period THEN v_changed := v_changed || format('period %s -> %s', coalesce(t.period::text, 'none'), coalesce(n.period::text, 'none')); END IF;
    IF n.harmonics IS DISTINCT FROM t.harmonics THEN v_changed := v_changed || format('harmonics %s -> %s', t.harmonics, n.harmonics); END IF;
    IF n.lambda IS DISTINCT FROM t.lambda THEN v_changed := v_changed || format('lambda %s -> %s', coalesce(t.lambda::text, 'auto'), coalesce(n.lambda::text, 'auto')); END IF;
    IF n.burn_in IS DISTINCT FROM t.burn_in THEN v_changed := v_changed || format('burn-in %s -> %s', t.burn_in, n.burn_in); END IF;
    IF n.history_buckets IS DISTINCT FROM t.history_buckets THEN v_changed := v_changed || format('history %s -> %s buckets', t.history_buckets, n.history_buckets); END IF;
    IF n.span IS DISTINCT FROM t.span THEN v_changed := v_changed || format('span %s -> %s', t.span, n.span); END IF;
    IF n.tz IS DISTINCT FROM t.tz THEN v_changed := v_changed || format('time zone %s -> %s', t.tz, n.tz); END IF;
    IF n.bucket IS DISTINCT FROM t.bucket THEN v_changed := v_changed || format('bucket %s -> %s', t.bucket, n.bucket); END IF;
    IF cardinality(v_changed) = 0 THEN
        RETURN format('tracker "%s" unchanged: every setting given is already in use', t.name);
    END IF;

    v_reread := n.bucket IS DISTINCT FROM t.bucket OR n.tz IS DISTINCT FROM t.tz;
    v_capture := v_reread OR n.span IS DISTINCT FROM t.span;
    v_replay := v_reread OR (n.horizon, n.degree, n.period, n.harmonics, n.lambda, n.burn_in)
                IS DISTINCT FROM (t.horizon, t.degree, t.period, t.harmonics, t.lambda, t.burn_in);

    -- Lock the series rows in key order first, as a drain batch does, and
    -- then the tracker row (which a batch holds FOR SHARE after its series):
    -- the same order, so the two never wait on each other in a cycle.
    PERFORM 1 FROM sidetrend.series s WHERE s.tracker_id = t.id ORDER BY s.series_key FOR UPDATE;
    UPDATE sidetrend.trackers tr SET horizon = n.horizon, degree = n.degree, period = n.period, harmonics = n.harmonics,
        lambda = n.lambda, burn_in = n.burn_in, history_buckets = n.history_buckets, span = n.span, tz = n.tz,
        bucket = n.bucket, settings_version = tr.settings_version + 1
    WHERE tr.id = t.id;
    IF v_capture THEN
        PERFORM set_config('lock_timeout', coalesce(nullif(current_setting('sidetrend.lock_timeout', true), ''), '2s'), true);
        PERFORM sidetrend.install_capture(t.id);
        PERFORM set_config('lock_timeout', v_timeout, true);
    END IF;
    IF v_reread THEN
        -- Buckets are numbered anew: read the source again (its backfill
        -- function deletes the points and the pending changes and marks
        -- every series for a replay), and drop what the old numbers mean.
        WITH gone AS (DELETE FROM sidetrend.forecast_issues i WHERE i.tracker_id = t.id RETURNING 1)
        SELECT count(*) INTO v_issues FROM gone;
        DELETE FROM sidetrend.series s WHERE s.tracker_id = t.id;
        DELETE FROM sidetrend.tuning x WHERE x.tracker_id = t.id;
        EXECUTE format('SELECT sidetrend.%I()', '_backfill_' || t.id);
    ELSIF v_replay THEN
        UPDATE sidetrend.series s SET rebuild = true, failed = false,
            lambda = CASE WHEN n.lambda IS DISTINCT FROM t.lambda THEN NULL ELSE s.lambda END
        WHERE s.tracker_id = t.id;
        IF (n.degree, n.period, n.harmonics) IS DISTINCT FROM (t.degree, t.period, t.harmonics) THEN
            DELETE FROM sidetrend.tuning x WHERE x.tracker_id = t.id;
        END IF;
    END IF;
    SELECT count(*) INTO v_series FROM sidetrend.series s WHERE s.tracker_id = t.id;
    SELECT count(*) INTO v_points FROM sidetrend.points p WHERE p.tracker_id = t.id;
    PERFORM pg_notify('sidetrend', t.id::text);
    RETURN format('tracker "%s" changed: %s; %s', t.name, array_to_string(v_changed, ', '),
        CASE WHEN v_reread THEN format('the source was read again into %s points of %s series (the %s served forecasts of the old buckets were deleted); the sidecar replays them', v_points, v_series, v_issues)
             WHEN v_replay THEN format('the sidecar replays its %s series from their %s stored points', v_series, v_points)
             ELSE 'no replay needed' END);
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.alter_tracker(
    name            text,
    horizon         int DEFAULT NULL,
    degree          int DEFAULT NULL,
    period          float8 DEFAULT NULL,
    harmonics       int DEFAULT NULL,
    lambda          float8 DEFAULT NULL,
    lambda_auto     boolean DEFAULT false,
    burn_in         int DEFAULT NULL,
    history_buckets int DEFAULT NULL,
    span            interval DEFAULT NULL,
    tz              text DEFAULT NULL,
    bucket          interval DEFAULT NULL
) RETURNS text
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._alter_tracker_as(current_user, name, horizon, degree, period, harmonics, lambda, lambda_auto,
                                   burn_in, history_buckets, span, tz, bucket);
-- +goose StatementEnd
COMMENT ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval)
    IS 'Change a tracker''s settings in place, keeping its points: horizon, degree, period (0: none), harmonics, lambda (or lambda_auto), burn_in, history_buckets, span, tz, bucket. Arguments left NULL keep their setting. Returns what changed.';
COMMENT ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval)
    IS 'Internal: alter_tracker for the given caller, owner-checked (call sidetrend.alter_tracker).';
COMMENT ON FUNCTION sidetrend.check_settings(interval, text, int, float8, int, float8, int, int, int, interval)
    IS 'Internal: raises, with what to use instead, when tracker settings are not usable.';

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
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of,
       x.data_buckets,
       f.horizon::float8 / x.data_buckets AS reach,
       CASE WHEN f.horizon > x.data_buckets
                THEN format('extrapolation beyond the data: %s buckets ahead of a series with %s buckets of history', f.horizon, x.data_buckets)
            WHEN x.memory IS NOT NULL AND f.horizon > x.memory
                THEN format('beyond the fit''s memory: %s buckets ahead, while lambda %s weighs mostly the last %s buckets',
                            f.horizon, coalesce(s.lambda, t.lambda), round(x.memory::numeric))
       END AS caution
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
CROSS JOIN LATERAL (
    SELECT s.folded_through - coalesce(s.first_bucket, s.folded_through) + 1 AS data_buckets,
           CASE WHEN coalesce(s.lambda, t.lambda) < 1 THEN 1 / (1 - coalesce(s.lambda, t.lambda)) END AS memory
) x
CROSS JOIN LATERAL unnest(s.forecast, s.se, s.cum_forecast, s.cum_se)
    WITH ORDINALITY AS f(forecast, se, cum_forecast, cum_se, horizon)
WHERE s.ready AND sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.series_status AS
SELECT t.name AS tracker,
       s.series_key,
       s.points,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS last_bucket,
       CASE WHEN s.failed THEN 'failed' WHEN s.ready THEN 'ready' ELSE 'warming' END AS state,
       coalesce(extract(epoch FROM now() - (SELECT min(c.at) FROM sidetrend.changes c
                 WHERE c.tracker_id = s.tracker_id AND c.series_key = s.series_key)), 0)::float8 AS lag_seconds,
       s.last_error,
       s.error_at
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE sidetrend.may_read(t.source, t.owner);

COMMENT ON COLUMN sidetrend.forecasts.tracker IS 'Tracker name (sidetrend.tracker_settings.tracker).';
COMMENT ON COLUMN sidetrend.forecasts.series_key IS 'The key columns'' values as text joined with |; '''' when the tracker has no key columns.';
COMMENT ON COLUMN sidetrend.forecasts.horizon IS 'Buckets ahead of as_of: 1 is the next bucket.';
COMMENT ON COLUMN sidetrend.forecasts.period_start IS 'Start of the bucket forecast (as_of plus horizon buckets, in the tracker''s calendar).';
COMMENT ON COLUMN sidetrend.forecasts.forecast IS 'Point forecast of the bucket''s value.';
COMMENT ON COLUMN sidetrend.forecasts.lower80 IS 'Lower bound of the 80 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper80 IS 'Upper bound of the 80 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.lower95 IS 'Lower bound of the 95 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper95 IS 'Upper bound of the 95 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.cum_forecast IS 'Sum of the forecasts from horizon 1 to this horizon (compare with a budget for the period).';
COMMENT ON COLUMN sidetrend.forecasts.cum_lower95 IS 'Lower bound of the 95 % interval of cum_forecast.';
COMMENT ON COLUMN sidetrend.forecasts.cum_upper95 IS 'Upper bound of the 95 % interval of cum_forecast.';
COMMENT ON COLUMN sidetrend.forecasts.as_of IS 'Start of the newest bucket folded into the estimate (the forecast origin).';
COMMENT ON COLUMN sidetrend.forecasts.data_buckets IS 'Buckets from the series'' first folded bucket to as_of: how much history the forecast rests on.';
COMMENT ON COLUMN sidetrend.forecasts.reach IS 'horizon / data_buckets: above 1 the forecast reaches further ahead than the series reaches back.';
COMMENT ON COLUMN sidetrend.forecasts.caution IS 'NULL, or why this forecast is an extrapolation to read with care: it reaches beyond the data''s own span (reach > 1), or beyond the fit''s memory of 1/(1 - lambda) buckets.';

COMMENT ON COLUMN sidetrend.slopes.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.slopes.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.slopes.as_of IS 'Start of the newest folded bucket, where level and slope are taken.';
COMMENT ON COLUMN sidetrend.slopes.level IS 'The trend part of the fit at as_of (seasonal terms left out).';
COMMENT ON COLUMN sidetrend.slopes.slope IS 'Change of the trend per bucket at as_of, in value units; 0 for a degree-0 model.';
COMMENT ON COLUMN sidetrend.slopes.slope_se IS 'Standard error of slope.';
COMMENT ON COLUMN sidetrend.slopes.slope_t IS 'slope / slope_se.';
COMMENT ON COLUMN sidetrend.slopes.slope_pct IS 'slope / level: relative change per bucket (multiply by 100 for percent).';
COMMENT ON COLUMN sidetrend.slopes.direction IS 'up or down when abs(slope_t) >= 2, else flat.';

COMMENT ON COLUMN sidetrend.series_status.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.series_status.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.series_status.points IS 'Buckets with data folded into the state.';
COMMENT ON COLUMN sidetrend.series_status.last_bucket IS 'Start of the newest folded bucket.';
COMMENT ON COLUMN sidetrend.series_status.state IS 'warming (no estimate yet), ready, or failed (its last fold failed; it keeps its last forecasts, see last_error).';
COMMENT ON COLUMN sidetrend.series_status.lag_seconds IS 'Age of the series'' oldest change still in the log; 0 when none waits.';
COMMENT ON COLUMN sidetrend.series_status.last_error IS 'The error of the series'' last fold, if any.';
COMMENT ON COLUMN sidetrend.series_status.error_at IS 'When last_error was written.';

COMMENT ON COLUMN sidetrend.tracker_settings.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.tracker_settings.source IS 'The tracked table, schema-qualified.';
COMMENT ON COLUMN sidetrend.tracker_settings.time_col IS 'Column of the row''s time.';
COMMENT ON COLUMN sidetrend.tracker_settings.value_col IS 'Column of the row''s value ('''' for a count tracker, which counts rows and needs none).';
COMMENT ON COLUMN sidetrend.tracker_settings.key_cols IS 'Columns whose values name a series.';
COMMENT ON COLUMN sidetrend.tracker_settings.bucket IS 'Bucket width.';
COMMENT ON COLUMN sidetrend.tracker_settings.agg IS 'How a bucket''s rows make its value: sum, mean, min, max, last or count.';
COMMENT ON COLUMN sidetrend.tracker_settings.empty IS 'What a bucket without rows between two with rows is: zero or gap (no information).';
COMMENT ON COLUMN sidetrend.tracker_settings.tz IS 'Time zone the buckets follow.';
COMMENT ON COLUMN sidetrend.tracker_settings.degree IS 'Degree of the local polynomial trend (0 to 3).';
COMMENT ON COLUMN sidetrend.tracker_settings.period IS 'Seasonal period in buckets; NULL for none.';
COMMENT ON COLUMN sidetrend.tracker_settings.harmonics IS 'Harmonic pairs of the season.';
COMMENT ON COLUMN sidetrend.tracker_settings.lambda IS 'Forgetting factor; NULL when the sidecar chooses it.';
COMMENT ON COLUMN sidetrend.tracker_settings.auto_tune IS 'Whether the sidecar tunes lambda by itself.';
COMMENT ON COLUMN sidetrend.tracker_settings.burn_in IS 'Points beyond the parameter count before forecasts are served.';
COMMENT ON COLUMN sidetrend.tracker_settings.horizon IS 'Buckets forecast.';
COMMENT ON COLUMN sidetrend.tracker_settings.history_buckets IS 'Buckets of served forecasts kept in forecast_history.';
COMMENT ON COLUMN sidetrend.tracker_settings.backfilled IS 'Whether the table''s existing rows have been read.';
COMMENT ON COLUMN sidetrend.tracker_settings.status IS 'active, paused (its table fails a check; resumes by itself) or broken (see last_error; sidetrend.rebuild resumes it).';
COMMENT ON COLUMN sidetrend.tracker_settings.last_error IS 'Why the tracker is paused or broken, and what to change.';
COMMENT ON COLUMN sidetrend.tracker_settings.created_at IS 'When the tracker was registered.';
COMMENT ON COLUMN sidetrend.tracker_settings.owner IS 'The role that registered it: it may change it.';
COMMENT ON COLUMN sidetrend.tracker_settings.span IS 'Rows further than this from now are rejected.';
COMMENT ON COLUMN sidetrend.tracker_settings.status_at IS 'When status last changed to paused or broken.';

COMMENT ON COLUMN sidetrend.actuals.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.actuals.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.actuals.bucket IS 'Bucket number in the tracker''s calendar.';
COMMENT ON COLUMN sidetrend.actuals.period_start IS 'Start of the bucket.';
COMMENT ON COLUMN sidetrend.actuals.value IS 'The bucket''s value under the tracker''s aggregate.';
COMMENT ON COLUMN sidetrend.actuals.rows IS 'Source rows in the bucket.';
COMMENT ON COLUMN sidetrend.actuals.folded IS 'Whether the bucket is folded into the state yet.';

COMMENT ON COLUMN sidetrend.accuracy.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.accuracy.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.accuracy.n_errors IS 'Discounted count of one-step errors scored after burn-in.';
COMMENT ON COLUMN sidetrend.accuracy.mae IS 'Discounted mean absolute one-step error.';
COMMENT ON COLUMN sidetrend.accuracy.rmse IS 'Root of the discounted mean squared one-step error.';
COMMENT ON COLUMN sidetrend.accuracy.mape IS 'Discounted mean absolute percentage one-step error (actuals of 0 left out).';
COMMENT ON COLUMN sidetrend.accuracy.bias IS 'Discounted mean one-step error (actual minus forecast).';
COMMENT ON COLUMN sidetrend.accuracy.coverage80 IS 'Share of actuals inside their 80 % one-step interval.';
COMMENT ON COLUMN sidetrend.accuracy.coverage95 IS 'Share of actuals inside their 95 % one-step interval.';
COMMENT ON COLUMN sidetrend.accuracy.as_of IS 'Start of the newest folded bucket.';

COMMENT ON COLUMN sidetrend.forecast_history.tracker_id IS 'Tracker id.';
COMMENT ON COLUMN sidetrend.forecast_history.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.forecast_history.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.forecast_history.issued_for IS 'Start of the newest folded bucket when the forecast was served.';
COMMENT ON COLUMN sidetrend.forecast_history.horizon IS 'Buckets ahead of issued_for.';
COMMENT ON COLUMN sidetrend.forecast_history.period_start IS 'Start of the bucket forecast.';
COMMENT ON COLUMN sidetrend.forecast_history.forecast IS 'The point forecast as served.';
COMMENT ON COLUMN sidetrend.forecast_history.lower95 IS 'Lower bound of the 95 % interval as served.';
COMMENT ON COLUMN sidetrend.forecast_history.upper95 IS 'Upper bound of the 95 % interval as served.';

COMMENT ON COLUMN sidetrend.accuracy_by_horizon.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.horizon IS 'Buckets ahead the forecasts were served for.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.n IS 'Served forecasts whose bucket has been folded since.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.mae IS 'Mean absolute error of those forecasts.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.rmse IS 'Root mean squared error of those forecasts.';
COMMENT ON COLUMN sidetrend.accuracy_by_horizon.coverage95 IS 'Share of actuals inside the 95 % interval served.';

COMMENT ON COLUMN sidetrend.rejected_rows.id IS 'Reject id (sidetrend.rejects).';
COMMENT ON COLUMN sidetrend.rejected_rows.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.rejected_rows.reason IS 'Why the row was not folded in.';
COMMENT ON COLUMN sidetrend.rejected_rows.row_data IS 'The tracked columns of the row, as text.';
COMMENT ON COLUMN sidetrend.rejected_rows.at IS 'When the row was rejected.';
COMMENT ON COLUMN sidetrend.rejected_rows.tracker_id IS 'Tracker id.';

-- grant_roles as in migration 00007, with alter_tracker among the writer's
-- functions; _alter_tracker_as is for the wrapper's callers only.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.grant_roles(reader text DEFAULT 'sidetrend_reader', writer text DEFAULT 'sidetrend_writer')
RETURNS void
LANGUAGE plpgsql SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    r  text;
    v  text;
BEGIN
    FOREACH r IN ARRAY ARRAY[grant_roles.reader, grant_roles.writer] LOOP
        IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = r) THEN
            RAISE NOTICE 'role "%" does not exist: no grants for it', r
                USING HINT = 'Create it (sql/roles.sql) and run SELECT sidetrend.grant_roles() again.';
            CONTINUE;
        END IF;
        EXECUTE format('GRANT USAGE ON SCHEMA sidetrend TO %I', r);
        FOR v IN SELECT format('%I.%I', schemaname, viewname) FROM pg_views WHERE schemaname = 'sidetrend' ORDER BY viewname LOOP
            EXECUTE format('GRANT SELECT ON %s TO %I', v, r);
        END LOOP;
        -- surprises has a row-level policy: a reader sees the rows of
        -- trackers whose source it may read.
        EXECUTE format('GRANT SELECT ON sidetrend.surprises TO %I', r);
        EXECUTE format('GRANT EXECUTE ON FUNCTION sidetrend._may_read_tracker(int, name) TO %I', r);
    END LOOP;
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = grant_roles.writer) THEN
        FOR v IN SELECT p.oid::regprocedure::text FROM pg_proc p
                 WHERE p.pronamespace = 'sidetrend'::regnamespace
                   AND p.proname IN ('track', 'untrack', 'rebuild', 'tune', 'request_tune', 'alter_tracker',
                                     '_track_as', '_untrack_as', '_rebuild_as', '_tune_as', '_request_tune_as',
                                     '_alter_tracker_as') LOOP
            EXECUTE format('GRANT EXECUTE ON FUNCTION %s TO %I', v, grant_roles.writer);
        END LOOP;
    END IF;
END
$fn$;
-- +goose StatementEnd
REVOKE EXECUTE ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.check_settings(interval, text, int, float8, int, float8, int, int, int, interval) FROM PUBLIC;
SELECT sidetrend.grant_roles();

-- +goose Down
-- The two views lose their new columns: dropped and made again in their
-- earlier form (00008, 00007), with their grants put back.
CREATE TEMP TABLE sidetrend_acl9 ON COMMIT DROP AS
SELECT c.relname AS view, a.grantee, a.privilege_type, a.is_grantable
FROM pg_class c
CROSS JOIN LATERAL aclexplode(c.relacl) a
WHERE c.relnamespace = 'sidetrend'::regnamespace
  AND c.relname IN ('forecasts', 'series_status')
  AND a.grantee <> c.relowner;
DROP VIEW sidetrend.forecasts;
DROP VIEW sidetrend.series_status;
CREATE VIEW sidetrend.forecasts AS
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
CREATE VIEW sidetrend.series_status AS
SELECT t.name AS tracker,
       s.series_key,
       s.points,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS last_bucket,
       CASE WHEN s.ready THEN 'ready' ELSE 'warming' END AS state,
       coalesce(extract(epoch FROM now() - (SELECT min(c.at) FROM sidetrend.changes c
                 WHERE c.tracker_id = s.tracker_id AND c.series_key = s.series_key)), 0)::float8 AS lag_seconds
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE sidetrend.may_read(t.source, t.owner);
-- +goose StatementBegin
DO $grants$
DECLARE
    g record;
BEGIN
    FOR g IN SELECT * FROM sidetrend_acl9 LOOP
        EXECUTE format('GRANT %s ON sidetrend.%I TO %s%s', g.privilege_type, g.view,
                       CASE WHEN g.grantee = 0 THEN 'PUBLIC' ELSE quote_ident(pg_get_userbyid(g.grantee)) END,
                       CASE WHEN g.is_grantable THEN ' WITH GRANT OPTION' ELSE '' END);
    END LOOP;
END
$grants$;
-- +goose StatementEnd
DROP FUNCTION IF EXISTS sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);
DROP FUNCTION IF EXISTS sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);
ALTER TABLE sidetrend.trackers DROP COLUMN IF EXISTS settings_version;
ALTER TABLE sidetrend.series DROP COLUMN IF EXISTS failed, DROP COLUMN IF EXISTS error_at;
