-- Log scale per tracker and a view of each series' components (issue 14,
-- item 4).
--
-- 1. sidetrend.trackers.transform: 'none' (as before) or 'log'. Capture is
--    unchanged: points keep the raw sums. The sidecar folds log(bucket
--    value) into the state; a bucket whose value is not positive is not
--    folded (the state skips it like a gap) and the series' last_error
--    names it (pgsync, foldPoints). On the log scale a bucket without rows
--    is a gap, whatever empty says (0 has no logarithm).
-- 2. What a log series stores: forecast = exp(log forecast), the median of
--    the bucket's value if the log errors are symmetric; se the standard
--    error on the log scale; cum_forecast the running sum of those medians;
--    cum_se NULL (a sum of log-normal values has no closed-form interval).
--    The views form a log tracker's bounds as exp(log forecast -+ t se),
--    computed as sidetrend.log_bound(forecast, -+t se), and leave the
--    cumulative bounds NULL. forecast_history and accuracy_by_horizon read
--    the tracker's transform the same way; alter_tracker deletes the
--    served forecasts when the transform changes (their se belongs to the
--    old scale).
-- 3. sidetrend.track(..., transform) and sidetrend.alter_tracker(...,
--    transform): a function's argument list cannot change in place, so
--    track, _track_as, alter_tracker and _alter_tracker_as are dropped and
--    created again. _track_as is 00007's body (settings checked by
--    sidetrend.check_settings) with the transform argument
--    and its check (every check of 00007 kept: check_caller,
--    source_problem, the caller's SELECT, the settings, the name);
--    _alter_tracker_as is 00009's with the transform (check_manage kept).
--    Both stay SECURITY DEFINER behind SECURITY INVOKER wrappers that pass
--    current_user; EXECUTE is revoked from PUBLIC and granted again by
--    sidetrend.grant_roles() (by name, as in 00009).
-- 4. sidetrend.series.season: the seasonal coefficients of the fit at the
--    newest bucket, pairs (sine, cosine) per harmonic; the view
--    sidetrend.components evaluates them at each phase of the period.
--
-- Down drops the view and the columns and restores 00007's track and
-- 00009's alter_tracker and the views' earlier bodies; trackers on the log
-- scale become trackers of the raw values (their series replay).

-- +goose Up
ALTER TABLE sidetrend.trackers ADD COLUMN transform text NOT NULL DEFAULT 'none'
    CHECK (transform IN ('none', 'log'));
COMMENT ON COLUMN sidetrend.trackers.transform IS
    'none, or log: the sidecar fits the logarithms of the bucket values and serves forecasts and bounds transformed back (exp).';
ALTER TABLE sidetrend.series ADD COLUMN season float8[];
COMMENT ON COLUMN sidetrend.series.season IS
    'Seasonal coefficients at the newest folded bucket, (sine, cosine) per harmonic (a harmonic at period/2 has sine 0), on the fitting scale; NULL without a season. sidetrend.components evaluates them.';

-- log_bound(point, shift) = exp(ln(point) + shift), the bound of a log
-- tracker whose served forecast point is exp(log forecast): NULL when it
-- would overflow a float8 (Postgres raises there), 0 when it would
-- underflow, NULL for a point that is not positive.
-- +goose StatementBegin
CREATE FUNCTION sidetrend.log_bound(point float8, shift float8) RETURNS float8
LANGUAGE sql IMMUTABLE PARALLEL SAFE SET search_path = pg_catalog, pg_temp
RETURN CASE WHEN point > 0 AND point < 'Infinity'::float8 AND shift > '-Infinity'::float8 AND shift < 'Infinity'::float8 THEN
           CASE WHEN ln(point) + shift >= 709 THEN NULL
                WHEN ln(point) + shift <= -708 THEN 0
                ELSE exp(ln(point) + shift) END
       END;
-- +goose StatementEnd
COMMENT ON FUNCTION sidetrend.log_bound(float8, float8) IS
    'exp(ln(point) + shift): a log tracker''s interval bound from its served forecast and -+ t se; NULL past the float8 range, 0 below it.';

DROP FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval);
DROP FUNCTION sidetrend._track_as(name, regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval);
DROP FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);
DROP FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);

-- +goose StatementBegin
CREATE FUNCTION sidetrend._track_as(
    caller     name,
    source     regclass,
    time_col   text,
    value_col  text,
    key_cols   text[],
    bucket     interval,
    agg        text,
    degree     int,
    period     float8,
    harmonics  int,
    lambda     float8,
    horizon    int,
    name       text,
    empty      text,
    tz         text,
    burn_in    int,
    span       interval,
    transform  text
) RETURNS int
LANGUAGE plpgsql SECURITY DEFINER SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    v_id       int;
    v_name     text;
    v_transform text := coalesce(_track_as.transform, 'none');
    -- On the log scale a bucket without rows is a gap: 0 has no logarithm.
    v_empty    text := coalesce(_track_as.empty, CASE WHEN _track_as.agg IN ('sum', 'count') AND coalesce(_track_as.transform, 'none') <> 'log'
                                                      THEN 'zero' ELSE 'gap' END);
    v_span     interval;
    v_value    text;
    v_timeout  text := current_setting('lock_timeout');
    p          record;
BEGIN
    PERFORM sidetrend.check_caller(caller);
    IF _track_as.source IS NULL THEN
        RAISE EXCEPTION 'the table to track is missing'
            USING ERRCODE = 'null_value_not_allowed', HINT = 'Pass source => a table such as ''public.sales''.';
    END IF;
    v_name := coalesce(_track_as.name, (SELECT c.relname::text FROM pg_class c WHERE c.oid = _track_as.source));
    IF v_name IS NULL OR btrim(v_name) = '' THEN
        RAISE EXCEPTION 'tracker name is empty'
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass name => a short name such as ''daily_sales'', or leave it out to use the table''s name.';
    END IF;
    IF length(v_name) > 200 OR v_name ~ '[[:cntrl:]]' THEN
        RAISE EXCEPTION 'tracker name "%" is not usable: it is longer than 200 characters or holds control characters', left(v_name, 40)
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass name => a short printable name such as ''daily_sales''.';
    END IF;
    IF coalesce(_track_as.value_col, '') = '' THEN
        IF _track_as.agg IS DISTINCT FROM 'count' THEN
            RAISE EXCEPTION 'value_col is missing'
                USING ERRCODE = 'invalid_parameter_value',
                      HINT = 'Pass value_col => a numeric column, or agg => ''count'', which counts rows and needs none.';
        END IF;
        v_value := '';
    ELSE
        v_value := _track_as.value_col;
    END IF;
    p := sidetrend.source_problem(_track_as.source, _track_as.time_col, v_value, _track_as.key_cols, NULL);
    IF p.code IS NOT NULL THEN
        RAISE EXCEPTION '%', p.message USING ERRCODE = p.code, HINT = p.hint;
    END IF;
    -- Forecasts are derived from the rows: a role that may not read a table
    -- may not track it (its forecasts would show the data).
    IF NOT has_table_privilege(caller, _track_as.source, 'SELECT') THEN
        RAISE EXCEPTION 'role "%" may not read %, so it may not track it', caller, _track_as.source::text
            USING ERRCODE = 'insufficient_privilege',
                  HINT = format('Forecasts are derived from the rows: tracking a table you cannot read would show its data. Ask its owner for GRANT SELECT ON %s TO %I.', _track_as.source::text, caller);
    END IF;

    IF _track_as.agg IS NULL OR _track_as.agg NOT IN ('sum', 'mean', 'min', 'max', 'last', 'count') THEN
        RAISE EXCEPTION 'unknown aggregate "%"', _track_as.agg
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use agg => sum, mean, min, max, last or count.';
    END IF;
    IF v_empty NOT IN ('zero', 'gap') THEN
        RAISE EXCEPTION 'empty => "%" is not known', _track_as.empty
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use empty => ''zero'' (no rows means 0) or ''gap'' (no rows means no information).';
    END IF;
    IF v_transform NOT IN ('none', 'log') THEN
        RAISE EXCEPTION 'transform => "%" is not known', _track_as.transform
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use transform => ''log'' (fit the logarithms of positive values, for a season that swings with the level) or ''none''.';
    END IF;
    IF v_transform = 'log' AND v_empty = 'zero' THEN
        RAISE EXCEPTION 'empty => ''zero'' does not go with transform => ''log'': 0 has no logarithm'
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Leave empty out (on the log scale a bucket without rows is a gap), or use transform => ''none''.';
    END IF;
    -- 100,000 buckets, at most 1000 years (a bucket over 100 years, which
    -- check_settings refuses, would overflow the product).
    v_span := coalesce(_track_as.span, CASE WHEN _track_as.bucket <= interval '100 years'
                                            THEN least(_track_as.bucket * 100000, interval '1000 years') END);
    PERFORM sidetrend.check_settings(_track_as.bucket, _track_as.tz, _track_as.degree, _track_as.period, _track_as.harmonics,
                                     _track_as.lambda, _track_as.horizon, _track_as.burn_in, 90, v_span);
    IF EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.name = v_name) THEN
        RAISE EXCEPTION 'a tracker named "%" already exists', v_name
            USING ERRCODE = 'duplicate_object', HINT = 'Pass name => a new name, or call sidetrend.untrack first.';
    END IF;

    INSERT INTO sidetrend.trackers (name, source, source_name, time_col, time_type, value_col, key_cols, bucket, agg,
                                    degree, period, harmonics, lambda, burn_in, horizon, empty, tz, owner, span, transform)
    VALUES (v_name, _track_as.source, _track_as.source::text, _track_as.time_col, 'timestamptz', v_value,
            coalesce(_track_as.key_cols, '{}'), _track_as.bucket, _track_as.agg, _track_as.degree, _track_as.period,
            coalesce(_track_as.harmonics, 0), _track_as.lambda, _track_as.burn_in, _track_as.horizon, v_empty,
            _track_as.tz, caller, v_span, v_transform)
    RETURNING id INTO v_id;

    -- Creating the triggers takes a lock that blocks the table's writers
    -- while it waits: wait at most sidetrend.lock_timeout (2 s by default).
    PERFORM set_config('lock_timeout', coalesce(nullif(current_setting('sidetrend.lock_timeout', true), ''), '2s'), true);
    PERFORM sidetrend.install_capture(v_id);
    PERFORM set_config('lock_timeout', v_timeout, true);
    PERFORM pg_notify('sidetrend', v_id::text);
    RETURN v_id;
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.track(
    source     regclass,
    time_col   text,
    value_col  text,
    key_cols   text[] DEFAULT '{}',
    bucket     interval DEFAULT '1 day',
    agg        text DEFAULT 'sum',
    degree     int DEFAULT 1,
    period     float8 DEFAULT NULL,
    harmonics  int DEFAULT 0,
    lambda     float8 DEFAULT 0.95,
    horizon    int DEFAULT 12,
    name       text DEFAULT NULL,
    empty      text DEFAULT NULL,
    tz         text DEFAULT 'UTC',
    burn_in    int DEFAULT 0,
    span       interval DEFAULT NULL,
    transform  text DEFAULT 'none'
) RETURNS int
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._track_as(current_user, source, time_col, value_col, key_cols, bucket, agg, degree, period,
                           harmonics, lambda, horizon, name, empty, tz, burn_in, span, transform);
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend._alter_tracker_as(
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
    bucket          interval,
    transform       text
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
    n.transform := coalesce(_alter_tracker_as.transform, t.transform);
    IF n.transform NOT IN ('none', 'log') THEN
        RAISE EXCEPTION 'transform => "%" is not known', _alter_tracker_as.transform
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use transform => ''log'' (fit the logarithms of positive values) or ''none''.';
    END IF;
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
    IF n.transform IS DISTINCT FROM t.transform THEN v_changed := v_changed || format('transform %s -> %s', t.transform, n.transform); END IF;
    IF cardinality(v_changed) = 0 THEN
        RETURN format('tracker "%s" unchanged: every setting given is already in use', t.name);
    END IF;

    -- A new transform changes what capture takes in (on the log scale a
    -- row whose value is not positive is a reject), so it rereads the
    -- source as a new bucket width does.
    v_reread := n.bucket IS DISTINCT FROM t.bucket OR n.tz IS DISTINCT FROM t.tz OR n.transform IS DISTINCT FROM t.transform;
    v_capture := v_reread OR n.span IS DISTINCT FROM t.span;
    v_replay := v_reread OR (n.horizon, n.degree, n.period, n.harmonics, n.lambda, n.burn_in, n.transform)
                IS DISTINCT FROM (t.horizon, t.degree, t.period, t.harmonics, t.lambda, t.burn_in, t.transform);

    -- Lock the series rows in key order first, as a drain batch does, and
    -- then the tracker row (which a batch holds FOR SHARE after its series):
    -- the same order, so the two never wait on each other in a cycle. A
    -- reread takes the tracker's backfill lock before both, as a batch
    -- takes it (shared) before its series.
    IF v_reread THEN
        PERFORM pg_advisory_xact_lock(21332, t.id);
    END IF;
    PERFORM 1 FROM sidetrend.series s WHERE s.tracker_id = t.id ORDER BY s.series_key FOR UPDATE;
    UPDATE sidetrend.trackers tr SET horizon = n.horizon, degree = n.degree, period = n.period, harmonics = n.harmonics,
        lambda = n.lambda, burn_in = n.burn_in, history_buckets = n.history_buckets, span = n.span, tz = n.tz,
        bucket = n.bucket, transform = n.transform, settings_version = tr.settings_version + 1
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
        IF n.transform IS DISTINCT FROM t.transform THEN
            -- Served forecasts keep the standard errors of their own scale,
            -- which the views read by the tracker's transform: the history
            -- of the old scale goes, and so does tuning done on it.
            WITH gone AS (DELETE FROM sidetrend.forecast_issues i WHERE i.tracker_id = t.id RETURNING 1)
            SELECT count(*) INTO v_issues FROM gone;
            DELETE FROM sidetrend.tuning x WHERE x.tracker_id = t.id;
        END IF;
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
             WHEN v_replay AND v_issues > 0 THEN format('the sidecar replays its %s series from their %s stored points (the %s served forecasts of the old scale were deleted)', v_series, v_points, v_issues)
             WHEN v_replay THEN format('the sidecar replays its %s series from their %s stored points', v_series, v_points)
             ELSE 'no replay needed' END);
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.alter_tracker(
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
    bucket          interval DEFAULT NULL,
    transform       text DEFAULT NULL
) RETURNS text
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._alter_tracker_as(current_user, name, horizon, degree, period, harmonics, lambda, lambda_auto,
                                   burn_in, history_buckets, span, tz, bucket, transform);
-- +goose StatementEnd

ALTER FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text) SET search_path = pg_catalog, pg_temp;
REVOKE EXECUTE ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend._track_as(name, regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text) FROM PUBLIC;
-- The writer role gets EXECUTE on all four again (grant_roles grants by name).
SELECT sidetrend.grant_roles();
COMMENT ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text)
    IS 'Register a tracker on a table: time column, value column, key columns, bucket width, aggregate, model, horizon, span and transform (none or log). The calling role becomes its owner. Returns the tracker id.';
COMMENT ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text)
    IS 'Change a tracker''s settings in place, keeping its points: horizon, degree, period (0: none), harmonics, lambda (or lambda_auto), burn_in, history_buckets, span, tz, bucket and transform (none or log). Arguments left NULL keep their setting. Returns what changed.';
COMMENT ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text)
    IS 'Internal: alter_tracker for the given caller, owner-checked (call sidetrend.alter_tracker).';

CREATE OR REPLACE VIEW sidetrend.forecasts AS
SELECT t.name AS tracker,
       s.series_key,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(s.folded_through + f.horizon, t.bucket, t.tz) AS period_start,
       f.forecast,
       CASE WHEN f.se <= 1e300 / s.t80 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, -s.t80 * f.se) ELSE f.forecast - s.t80 * f.se END END AS lower80,
       CASE WHEN f.se <= 1e300 / s.t80 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, s.t80 * f.se) ELSE f.forecast + s.t80 * f.se END END AS upper80,
       CASE WHEN f.se <= 1e300 / s.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, -s.t95 * f.se) ELSE f.forecast - s.t95 * f.se END END AS lower95,
       CASE WHEN f.se <= 1e300 / s.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, s.t95 * f.se) ELSE f.forecast + s.t95 * f.se END END AS upper95,
       f.cum_forecast,
       CASE WHEN t.transform <> 'log' AND f.cum_se <= 1e300 / s.t95 THEN f.cum_forecast - s.t95 * f.cum_se END AS cum_lower95,
       CASE WHEN t.transform <> 'log' AND f.cum_se <= 1e300 / s.t95 THEN f.cum_forecast + s.t95 * f.cum_se END AS cum_upper95,
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

CREATE OR REPLACE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id,
       t.name AS tracker,
       i.series_key,
       sidetrend.bucket_start(i.issued_for, t.bucket, t.tz) AS issued_for,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.forecast,
       CASE WHEN i.se IS NULL THEN f.lower95
            WHEN f.se <= 1e300 / i.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, -i.t95 * f.se) ELSE f.forecast - i.t95 * f.se END END AS lower95,
       CASE WHEN i.se IS NULL THEN f.upper95
            WHEN f.se <= 1e300 / i.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, i.t95 * f.se) ELSE f.forecast + i.t95 * f.se END END AS upper95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.forecast, i.lower95, i.upper95, i.se)
    WITH ORDINALITY AS f(forecast, lower95, upper95, se, horizon)
WHERE sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.accuracy_by_horizon AS
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
                WHEN f.se <= 1e300 / i.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, -i.t95 * f.se) ELSE f.forecast - i.t95 * f.se END END AS lower95,
           CASE WHEN i.se IS NULL THEN f.upper95
                WHEN f.se <= 1e300 / i.t95 THEN CASE WHEN t.transform = 'log' THEN sidetrend.log_bound(f.forecast, i.t95 * f.se) ELSE f.forecast + i.t95 * f.se END END AS upper95
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

CREATE OR REPLACE VIEW sidetrend.tracker_settings AS
SELECT t.name AS tracker, t.source_name AS source, t.time_col, t.value_col, t.key_cols,
       t.bucket, t.agg, t.empty, t.tz, t.degree, t.period, t.harmonics, t.lambda, t.auto_tune,
       t.burn_in, t.horizon, t.history_buckets, t.backfilled, t.status, t.last_error, t.created_at,
       t.owner, t.span, t.status_at, t.transform
FROM sidetrend.trackers t
WHERE sidetrend.may_read(t.source, t.owner);
COMMENT ON COLUMN sidetrend.tracker_settings.transform IS 'none, or log: the values are fitted on the log scale and forecasts transformed back.';
COMMENT ON COLUMN sidetrend.forecasts.forecast IS 'Point forecast of the bucket''s value (transform log: exp of the log forecast, the median if log errors are symmetric).';
COMMENT ON COLUMN sidetrend.forecasts.lower80 IS 'Lower bound of the 80 % prediction interval (transform log: exp of the log bound); NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper80 IS 'Upper bound of the 80 % prediction interval (transform log: exp of the log bound); NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.lower95 IS 'Lower bound of the 95 % prediction interval (transform log: exp of the log bound); NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper95 IS 'Upper bound of the 95 % prediction interval (transform log: exp of the log bound); NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.cum_forecast IS 'Sum of the forecasts from horizon 1 to this horizon (compare with a budget for the period); transform log: the sum of the medians.';
COMMENT ON COLUMN sidetrend.forecasts.cum_lower95 IS 'Lower bound of the 95 % interval of cum_forecast; NULL for transform log (a sum of log-normal values has no closed-form bound).';
COMMENT ON COLUMN sidetrend.forecasts.cum_upper95 IS 'Upper bound of the 95 % interval of cum_forecast; NULL for transform log.';

-- components: the fit's parts at the newest bucket, one row per series and
-- phase of the period (one row with phase NULL for a tracker without a
-- season). The seasonal part of bucket b is
--     sum_h a_h sin(h w (b - N)) + c_h cos(h w (b - N)),  w = 2 pi / period,
-- with N the newest folded bucket (theta is in coordinates relative to N);
-- phase k is every bucket b with b = k modulo the period, evaluated at
-- b - N = -((N - k) mod period).
CREATE VIEW sidetrend.components AS
SELECT t.name AS tracker,
       s.series_key,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of,
       s.level,
       s.slope,
       k.phase,
       e.effect,
       CASE WHEN k.phase IS NOT NULL THEN sidetrend.bucket_start(s.folded_through - floor(k.back)::bigint, t.bucket, t.tz) END AS last_start,
       t.transform AS scale
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
LEFT JOIN LATERAL (
    SELECT g.phase, (s.folded_through - g.phase)::float8 - t.period * floor((s.folded_through - g.phase)::float8 / t.period) AS back
    FROM generate_series(0, ceil(t.period)::int - 1) AS g(phase)
    WHERE s.season IS NOT NULL
) k ON true
LEFT JOIN LATERAL (
    SELECT sum(s.season[2 * h.h - 1] * sin(2 * pi() * h.h * -k.back / t.period)
             + s.season[2 * h.h] * cos(2 * pi() * h.h * -k.back / t.period)) AS effect
    FROM generate_series(1, cardinality(s.season) / 2) AS h(h)
    WHERE k.phase IS NOT NULL
) e ON true
WHERE s.ready AND sidetrend.may_read(t.source, t.owner);
COMMENT ON VIEW sidetrend.components IS
    'What the fit of each series is made of at its newest bucket: level and slope of the trend, and the seasonal effect at each phase of the period (one row per phase). For trackers with transform log all of it is on the log scale: exp(effect) is a factor. Shows only trackers whose source table the reader may SELECT.';
COMMENT ON COLUMN sidetrend.components.tracker IS 'Tracker name.';
COMMENT ON COLUMN sidetrend.components.series_key IS 'The key columns'' values as text joined with |.';
COMMENT ON COLUMN sidetrend.components.as_of IS 'Start of the newest folded bucket, where the components are taken.';
COMMENT ON COLUMN sidetrend.components.level IS 'The trend part of the fit at as_of (seasonal terms left out), on the fitting scale (see scale).';
COMMENT ON COLUMN sidetrend.components.slope IS 'Change of the trend part per bucket at as_of, on the fitting scale (for scale log: about the relative growth per bucket).';
COMMENT ON COLUMN sidetrend.components.phase IS 'Phase in the seasonal period, 0 to ceil(period) - 1: the buckets whose number modulo the period is phase. NULL for a tracker without a season.';
COMMENT ON COLUMN sidetrend.components.effect IS 'The seasonal part of the fit at this phase, added to the trend (for scale log, exp(effect) multiplies it). NULL without a season.';
COMMENT ON COLUMN sidetrend.components.last_start IS 'Start of the newest bucket at or before as_of in this phase (for a period that is not a whole number of buckets, the bucket the phase falls in).';
COMMENT ON COLUMN sidetrend.components.scale IS 'The tracker''s transform: none (value units) or log (natural logarithms of the values).';
-- The new view is granted to the reader and writer roles like the others.
SELECT sidetrend.grant_roles();

-- +goose Down
DROP VIEW sidetrend.components;
-- The views' bodies before (00009, 00008), with the same columns: CREATE OR
-- REPLACE keeps their grants. tracker_settings loses its last column, so it
-- is dropped and made again with its grants.
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

CREATE OR REPLACE VIEW sidetrend.forecast_history AS
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

CREATE OR REPLACE VIEW sidetrend.accuracy_by_horizon AS
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

CREATE TEMP TABLE sidetrend_acl12 ON COMMIT DROP AS
SELECT a.grantee, a.privilege_type, a.is_grantable
FROM pg_class c CROSS JOIN LATERAL aclexplode(c.relacl) a
WHERE c.oid = 'sidetrend.tracker_settings'::regclass AND a.grantee <> c.relowner;
DROP VIEW sidetrend.tracker_settings;
CREATE VIEW sidetrend.tracker_settings AS
SELECT t.name AS tracker, t.source_name AS source, t.time_col, t.value_col, t.key_cols,
       t.bucket, t.agg, t.empty, t.tz, t.degree, t.period, t.harmonics, t.lambda, t.auto_tune,
       t.burn_in, t.horizon, t.history_buckets, t.backfilled, t.status, t.last_error, t.created_at,
       t.owner, t.span, t.status_at
FROM sidetrend.trackers t
WHERE sidetrend.may_read(t.source, t.owner);
-- +goose StatementBegin
DO $grants$
DECLARE
    g record;
BEGIN
    FOR g IN SELECT * FROM sidetrend_acl12 LOOP
        EXECUTE format('GRANT %s ON sidetrend.tracker_settings TO %s%s', g.privilege_type,
                       CASE WHEN g.grantee = 0 THEN 'PUBLIC' ELSE quote_ident(pg_get_userbyid(g.grantee)) END,
                       CASE WHEN g.is_grantable THEN ' WITH GRANT OPTION' ELSE '' END);
    END LOOP;
END
$grants$;
-- +goose StatementEnd
COMMENT ON COLUMN sidetrend.forecasts.forecast IS 'Point forecast of the bucket''s value.';
COMMENT ON COLUMN sidetrend.forecasts.lower80 IS 'Lower bound of the 80 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper80 IS 'Upper bound of the 80 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.lower95 IS 'Lower bound of the 95 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.upper95 IS 'Upper bound of the 95 % prediction interval; NULL while the series has too few degrees of freedom.';
COMMENT ON COLUMN sidetrend.forecasts.cum_forecast IS 'Sum of the forecasts from horizon 1 to this horizon (compare with a budget for the period).';
COMMENT ON COLUMN sidetrend.forecasts.cum_lower95 IS 'Lower bound of the 95 % interval of cum_forecast.';
COMMENT ON COLUMN sidetrend.forecasts.cum_upper95 IS 'Upper bound of the 95 % interval of cum_forecast.';

DROP FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text);
DROP FUNCTION sidetrend._track_as(name, regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval, text);
DROP FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text);
DROP FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval, text);

-- +goose StatementBegin
CREATE FUNCTION sidetrend._track_as(
    caller     name,
    source     regclass,
    time_col   text,
    value_col  text,
    key_cols   text[],
    bucket     interval,
    agg        text,
    degree     int,
    period     float8,
    harmonics  int,
    lambda     float8,
    horizon    int,
    name       text,
    empty      text,
    tz         text,
    burn_in    int,
    span       interval
) RETURNS int
LANGUAGE plpgsql SECURITY DEFINER SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    v_id       int;
    v_name     text;
    v_empty    text := coalesce(_track_as.empty, CASE WHEN _track_as.agg IN ('sum', 'count') THEN 'zero' ELSE 'gap' END);
    v_span     interval;
    v_value    text;
    v_timeout  text := current_setting('lock_timeout');
    p          record;
BEGIN
    PERFORM sidetrend.check_caller(caller);
    IF _track_as.source IS NULL THEN
        RAISE EXCEPTION 'the table to track is missing'
            USING ERRCODE = 'null_value_not_allowed', HINT = 'Pass source => a table such as ''public.sales''.';
    END IF;
    v_name := coalesce(_track_as.name, (SELECT c.relname::text FROM pg_class c WHERE c.oid = _track_as.source));
    IF v_name IS NULL OR btrim(v_name) = '' THEN
        RAISE EXCEPTION 'tracker name is empty'
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass name => a short name such as ''daily_sales'', or leave it out to use the table''s name.';
    END IF;
    IF length(v_name) > 200 OR v_name ~ '[[:cntrl:]]' THEN
        RAISE EXCEPTION 'tracker name "%" is not usable: it is longer than 200 characters or holds control characters', left(v_name, 40)
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass name => a short printable name such as ''daily_sales''.';
    END IF;
    IF coalesce(_track_as.value_col, '') = '' THEN
        IF _track_as.agg IS DISTINCT FROM 'count' THEN
            RAISE EXCEPTION 'value_col is missing'
                USING ERRCODE = 'invalid_parameter_value',
                      HINT = 'Pass value_col => a numeric column, or agg => ''count'', which counts rows and needs none.';
        END IF;
        v_value := '';
    ELSE
        v_value := _track_as.value_col;
    END IF;
    p := sidetrend.source_problem(_track_as.source, _track_as.time_col, v_value, _track_as.key_cols, NULL);
    IF p.code IS NOT NULL THEN
        RAISE EXCEPTION '%', p.message USING ERRCODE = p.code, HINT = p.hint;
    END IF;
    -- Forecasts are derived from the rows: a role that may not read a table
    -- may not track it (its forecasts would show the data).
    IF NOT has_table_privilege(caller, _track_as.source, 'SELECT') THEN
        RAISE EXCEPTION 'role "%" may not read %, so it may not track it', caller, _track_as.source::text
            USING ERRCODE = 'insufficient_privilege',
                  HINT = format('Forecasts are derived from the rows: tracking a table you cannot read would show its data. Ask its owner for GRANT SELECT ON %s TO %I.', _track_as.source::text, caller);
    END IF;

    PERFORM sidetrend.bucket_check(_track_as.bucket);
    IF _track_as.bucket > interval '100 years' THEN
        RAISE EXCEPTION 'bucket width ''%'' is longer than 100 years', _track_as.bucket
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a bucket such as ''1 day'', ''1 month'' or ''1 year''.';
    END IF;
    IF _track_as.agg IS NULL OR _track_as.agg NOT IN ('sum', 'mean', 'min', 'max', 'last', 'count') THEN
        RAISE EXCEPTION 'unknown aggregate "%"', _track_as.agg
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use agg => sum, mean, min, max, last or count.';
    END IF;
    IF v_empty NOT IN ('zero', 'gap') THEN
        RAISE EXCEPTION 'empty => "%" is not known', _track_as.empty
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use empty => ''zero'' (no rows means 0) or ''gap'' (no rows means no information).';
    END IF;
    PERFORM sidetrend.zone_check(_track_as.tz);
    IF _track_as.degree IS NULL OR _track_as.degree < 0 OR _track_as.degree > 3 THEN
        RAISE EXCEPTION 'degree % is not supported', _track_as.degree
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a polynomial degree from 0 to 3 (1 is a local linear trend).';
    END IF;
    IF _track_as.lambda IS NOT NULL AND NOT (_track_as.lambda > 0 AND _track_as.lambda <= 1) THEN
        RAISE EXCEPTION 'lambda % is outside (0, 1]', _track_as.lambda
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a forgetting factor such as 0.95 (1 means no forgetting), or NULL to let the sidecar choose it.';
    END IF;
    IF _track_as.period IS NULL AND coalesce(_track_as.harmonics, 0) <> 0 THEN
        RAISE EXCEPTION '% harmonics need a period', _track_as.harmonics
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass period => the seasonal period in buckets (7 for weekly in days), or harmonics => 0.';
    END IF;
    IF _track_as.period IS NOT NULL THEN
        -- In Postgres NaN is greater than every number: test it by name.
        IF _track_as.period = 'NaN'::float8 OR _track_as.period = 'Infinity'::float8 THEN
            RAISE EXCEPTION 'period % is not a number of buckets', _track_as.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass period => the seasonal period in buckets, such as 7 or 365.25.';
        END IF;
        IF NOT (_track_as.period >= 2) THEN
            RAISE EXCEPTION 'period % is too short', _track_as.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'A seasonal period must be at least 2 buckets.';
        END IF;
        IF _track_as.period > 100000 THEN
            RAISE EXCEPTION 'period % is longer than 100000 buckets', _track_as.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a wider bucket, or a period such as 7, 24 or 365.25 buckets.';
        END IF;
        IF _track_as.harmonics IS NULL OR _track_as.harmonics < 1 OR _track_as.harmonics > 6 THEN
            RAISE EXCEPTION '% harmonics are not supported with a period', _track_as.harmonics
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Use harmonics => 1 to 6.';
        END IF;
        IF _track_as.harmonics > _track_as.period / 2 THEN
            RAISE EXCEPTION '% harmonics are too many for period %', _track_as.harmonics, _track_as.period
                USING ERRCODE = 'invalid_parameter_value', HINT = format('Use at most %s harmonics (period/2).', floor(_track_as.period / 2));
        END IF;
    END IF;
    IF _track_as.horizon IS NULL OR _track_as.horizon < 1 OR _track_as.horizon > 1000 THEN
        RAISE EXCEPTION 'horizon % is out of range', _track_as.horizon
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a horizon of 1 to 1000 buckets (the live endpoint serves longer ones).';
    END IF;
    IF _track_as.burn_in IS NULL OR _track_as.burn_in < 0 OR _track_as.burn_in > 100000 THEN
        RAISE EXCEPTION 'burn_in % is out of range', _track_as.burn_in
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use burn_in => 0 to 100000 points.';
    END IF;
    v_span := coalesce(_track_as.span, least(_track_as.bucket * 100000, interval '1000 years'));
    IF v_span < _track_as.bucket OR v_span > interval '10000 years' THEN
        RAISE EXCEPTION 'span ''%'' is out of range', v_span
            USING ERRCODE = 'invalid_parameter_value',
                  HINT = 'Use a span of at least one bucket and at most 10000 years (the whole calendar): rows further than the span from now are rejected.';
    END IF;
    IF EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.name = v_name) THEN
        RAISE EXCEPTION 'a tracker named "%" already exists', v_name
            USING ERRCODE = 'duplicate_object', HINT = 'Pass name => a new name, or call sidetrend.untrack first.';
    END IF;

    INSERT INTO sidetrend.trackers (name, source, source_name, time_col, time_type, value_col, key_cols, bucket, agg,
                                    degree, period, harmonics, lambda, burn_in, horizon, empty, tz, owner, span)
    VALUES (v_name, _track_as.source, _track_as.source::text, _track_as.time_col, 'timestamptz', v_value,
            coalesce(_track_as.key_cols, '{}'), _track_as.bucket, _track_as.agg, _track_as.degree, _track_as.period,
            coalesce(_track_as.harmonics, 0), _track_as.lambda, _track_as.burn_in, _track_as.horizon, v_empty,
            _track_as.tz, caller, v_span)
    RETURNING id INTO v_id;

    -- Creating the triggers takes a lock that blocks the table's writers
    -- while it waits: wait at most sidetrend.lock_timeout (2 s by default).
    PERFORM set_config('lock_timeout', coalesce(nullif(current_setting('sidetrend.lock_timeout', true), ''), '2s'), true);
    PERFORM sidetrend.install_capture(v_id);
    PERFORM set_config('lock_timeout', v_timeout, true);
    PERFORM pg_notify('sidetrend', v_id::text);
    RETURN v_id;
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.track(
    source     regclass,
    time_col   text,
    value_col  text,
    key_cols   text[] DEFAULT '{}',
    bucket     interval DEFAULT '1 day',
    agg        text DEFAULT 'sum',
    degree     int DEFAULT 1,
    period     float8 DEFAULT NULL,
    harmonics  int DEFAULT 0,
    lambda     float8 DEFAULT 0.95,
    horizon    int DEFAULT 12,
    name       text DEFAULT NULL,
    empty      text DEFAULT NULL,
    tz         text DEFAULT 'UTC',
    burn_in    int DEFAULT 0,
    span       interval DEFAULT NULL
) RETURNS int
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._track_as(current_user, source, time_col, value_col, key_cols, bucket, agg, degree, period,
                           harmonics, lambda, horizon, name, empty, tz, burn_in, span);
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend._alter_tracker_as(
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
CREATE FUNCTION sidetrend.alter_tracker(
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

ALTER FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval) SET search_path = pg_catalog, pg_temp;
REVOKE EXECUTE ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend._track_as(name, regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval) FROM PUBLIC;
-- The writer role gets EXECUTE on all four again (grant_roles grants by name).
SELECT sidetrend.grant_roles();
COMMENT ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval)
    IS 'Register a tracker on a table: time column, value column, key columns, bucket width, aggregate, model, horizon, span. The calling role becomes its owner. Returns the tracker id.';
COMMENT ON FUNCTION sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval)
    IS 'Change a tracker''s settings in place, keeping its points: horizon, degree, period (0: none), harmonics, lambda (or lambda_auto), burn_in, history_buckets, span, tz, bucket. Arguments left NULL keep their setting. Returns what changed.';
COMMENT ON FUNCTION sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval)
    IS 'Internal: alter_tracker for the given caller, owner-checked (call sidetrend.alter_tracker).';
DROP FUNCTION sidetrend.log_bound(float8, float8);
-- Series of log trackers replay on the raw values.
UPDATE sidetrend.series s SET rebuild = true FROM sidetrend.trackers t WHERE t.id = s.tracker_id AND t.transform = 'log';
DELETE FROM sidetrend.forecast_issues i USING sidetrend.trackers t WHERE t.id = i.tracker_id AND t.transform = 'log';
ALTER TABLE sidetrend.series DROP COLUMN season;
ALTER TABLE sidetrend.trackers DROP COLUMN transform;
