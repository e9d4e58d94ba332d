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

-- check_settings raises, with what to use instead, when a tracker's
-- settings are not usable (the checks of track, for alter_tracker).
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.check_settings(bucket interval, tz text, degree int, period float8, harmonics int,
                                                    lambda float8, horizon int, burn_in int, history_buckets int, span interval)
RETURNS void
LANGUAGE plpgsql STABLE SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    PERFORM sidetrend.bucket_check(check_settings.bucket);
    IF check_settings.bucket > interval '100 years' THEN
        RAISE EXCEPTION 'bucket width ''%'' is longer than 100 years', check_settings.bucket
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a bucket such as ''1 day'', ''1 month'' or ''1 year''.';
    END IF;
    PERFORM sidetrend.zone_check(check_settings.tz);
    IF check_settings.degree IS NULL OR check_settings.degree < 0 OR check_settings.degree > 3 THEN
        RAISE EXCEPTION 'degree % is not supported', check_settings.degree
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a polynomial degree from 0 to 3 (1 is a local linear trend).';
    END IF;
    IF check_settings.lambda IS NOT NULL AND NOT (check_settings.lambda > 0 AND check_settings.lambda <= 1) THEN
        RAISE EXCEPTION 'lambda % is outside (0, 1]', check_settings.lambda
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a forgetting factor such as 0.95 (1 means no forgetting), or lambda_auto => true to let the sidecar choose it.';
    END IF;
    IF check_settings.period IS NULL AND coalesce(check_settings.harmonics, 0) <> 0 THEN
        RAISE EXCEPTION '% harmonics need a period', check_settings.harmonics
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass period => the seasonal period in buckets (7 for weekly in days), or harmonics => 0.';
    END IF;
    IF check_settings.period IS NOT NULL THEN
        -- In Postgres NaN is greater than every number: test it by name.
        IF check_settings.period = 'NaN'::float8 OR check_settings.period = 'Infinity'::float8 THEN
            RAISE EXCEPTION 'period % is not a number of buckets', check_settings.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass period => the seasonal period in buckets, such as 7 or 365.25, or period => 0 for no season.';
        END IF;
        IF NOT (check_settings.period >= 2) THEN
            RAISE EXCEPTION 'period % is too short', check_settings.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'A seasonal period must be at least 2 buckets; period => 0 removes the season.';
        END IF;
        IF check_settings.period > 100000 THEN
            RAISE EXCEPTION 'period % is longer than 100000 buckets', check_settings.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a wider bucket, or a period such as 7, 24 or 365.25 buckets.';
        END IF;
        IF check_settings.harmonics IS NULL OR check_settings.harmonics < 1 OR check_settings.harmonics > 6 THEN
            RAISE EXCEPTION '% harmonics are not supported with a period', check_settings.harmonics
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Use harmonics => 1 to 6.';
        END IF;
        IF check_settings.harmonics > check_settings.period / 2 THEN
            RAISE EXCEPTION '% harmonics are too many for period %', check_settings.harmonics, check_settings.period
                USING ERRCODE = 'invalid_parameter_value', HINT = format('Use at most %s harmonics (period/2).', floor(check_settings.period / 2));
        END IF;
    END IF;
    IF check_settings.horizon IS NULL OR check_settings.horizon < 1 OR check_settings.horizon > 1000 THEN
        RAISE EXCEPTION 'horizon % is out of range', check_settings.horizon
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a horizon of 1 to 1000 buckets (the live endpoint serves longer ones).';
    END IF;
    IF check_settings.burn_in IS NULL OR check_settings.burn_in < 0 OR check_settings.burn_in > 100000 THEN
        RAISE EXCEPTION 'burn_in % is out of range', check_settings.burn_in
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use burn_in => 0 to 100000 points.';
    END IF;
    IF check_settings.history_buckets IS NULL OR check_settings.history_buckets < 0 OR check_settings.history_buckets > 100000 THEN
        RAISE EXCEPTION 'history_buckets % is out of range', check_settings.history_buckets
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use history_buckets => 0 (keep no served forecasts) to 100000 buckets.';
    END IF;
    IF check_settings.span IS NULL OR check_settings.span < check_settings.bucket OR check_settings.span > interval '10000 years' THEN
        RAISE EXCEPTION 'span ''%'' is out of range', check_settings.span
            USING ERRCODE = 'invalid_parameter_value',
                  HINT = 'Use a span of at least one bucket and at most 10000 years (the whole calendar): rows further than the span from now are rejected.';
    END IF;
END
$fn$;
-- +goose StatementEnd

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
DROP FUNCTION IF EXISTS sidetrend.alter_tracker(text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);
DROP FUNCTION IF EXISTS sidetrend._alter_tracker_as(name, text, int, int, float8, int, float8, boolean, int, int, interval, text, interval);
DROP FUNCTION IF EXISTS sidetrend.check_settings(interval, text, int, float8, int, float8, int, int, int, interval);
ALTER TABLE sidetrend.trackers DROP COLUMN IF EXISTS settings_version;
ALTER TABLE sidetrend.series DROP COLUMN IF EXISTS failed, DROP COLUMN IF EXISTS error_at;
