-- What analysts and finance teams read and do: accuracy, tuning, surprises,
-- forecast history, actuals, and the reader and writer roles.
--
-- sidetrend.actuals              bucket values as the estimator sees them
-- sidetrend.tracker_settings     each tracker's source, calendar and model
-- sidetrend.accuracy             one-step error statistics per series
-- sidetrend.accuracy_by_horizon  served forecasts against what happened, per horizon
-- sidetrend.tuning               stored results of the lambda search (the sidecar writes them)
-- sidetrend.tune_requests        asks the sidecar to tune a tracker
-- sidetrend.tune()               reads (and applies) stored tuning results
-- sidetrend.surprises            actuals outside the 95 % interval and trend turns
-- sidetrend.forecast_history     forecasts as they were served, kept history_buckets back
-- sidetrend_reader, sidetrend_writer  roles for people, created when the migrating role may
--
-- Access: track(), untrack() and tune() run with the rights of the schema's
-- owner (SECURITY DEFINER, fixed search_path), so a writer needs no grant on
-- sidetrend's tables and no ownership of the tables it tracks. In exchange,
-- the session's role must be allowed to SELECT a table to track, untrack or
-- tune it: forecasts are derived from the data, so tracking a table one
-- cannot read would leak it through the views. The check is made against
-- session_user (the role that logged in), because inside a SECURITY DEFINER
-- function current_user is the owner.

-- +goose Up
ALTER TABLE sidetrend.trackers
    ADD COLUMN history_buckets int NOT NULL DEFAULT 90 CHECK (history_buckets >= 0),
    ADD COLUMN auto_tune boolean NOT NULL DEFAULT false;
COMMENT ON COLUMN sidetrend.trackers.history_buckets
    IS 'How many buckets of served forecasts sidetrend.forecast_history keeps, counted back from the newest issue; 0 keeps none.';
COMMENT ON COLUMN sidetrend.trackers.auto_tune
    IS 'The sidecar chooses lambda itself (set when a tracker created with lambda => NULL is tuned for the first time).';

ALTER TABLE sidetrend.series
    ADD COLUMN last_direction text CHECK (last_direction IN ('up', 'down'));
COMMENT ON COLUMN sidetrend.series.last_direction
    IS 'The last slope direction that was not flat (|slope_t| >= 2): a slope_turn surprise is a change of it.';

-- point_value applies a tracker's aggregate to one bucket of sidetrend.points;
-- NULL when the bucket holds no row (n <= 0).
CREATE FUNCTION sidetrend.point_value(agg text, n bigint, sum float8, min float8, max float8, last_v float8)
RETURNS float8
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE WHEN n > 0 THEN
    CASE agg WHEN 'sum' THEN sum WHEN 'count' THEN n::float8 WHEN 'mean' THEN sum / n
             WHEN 'min' THEN min WHEN 'max' THEN max WHEN 'last' THEN last_v END
END;

-- The index of the first bucket that starts at or after t.
CREATE FUNCTION sidetrend.bucket_ceil(t timestamptz, width interval, tz text) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN sidetrend.bucket_index(t, width, tz)
    + (sidetrend.bucket_start(sidetrend.bucket_index(t, width, tz), width, tz) < t)::int;

-- The standard normal distribution function Phi(x), by the Taylor series of
-- Marsaglia, "Evaluating the Normal Distribution", Journal of Statistical
-- Software 11(4), 2004:
--
--   Phi(x) = 1/2 + phi(x) (x + x^3/3 + x^5/(3*5) + x^7/(3*5*7) + ...)
--
-- summed until a term no longer changes the sum; absolute error about 1e-15.
-- Beyond |x| > 38 it returns 0 or 1 (Phi(-38) is below 1e-300).
-- +goose StatementBegin
CREATE FUNCTION sidetrend.normal_cdf(x float8) RETURNS float8
LANGUAGE plpgsql IMMUTABLE STRICT PARALLEL SAFE AS $$
DECLARE
    s float8 := x;
    t float8 := 0;
    b float8 := x;
    q float8 := x * x;
    i float8 := 1;
BEGIN
    IF x = 'NaN'::float8 THEN
        RETURN x;
    ELSIF x < -38 THEN
        RETURN 0;
    ELSIF x > 38 THEN
        RETURN 1;
    END IF;
    WHILE s <> t LOOP
        t := s;
        i := i + 2;
        b := b * q / i;
        s := t + b;
    END LOOP;
    -- 0.918938533204672741780 = log(sqrt(2 pi))
    RETURN least(1, greatest(0, 0.5 + s * exp(-0.5 * q - 0.918938533204672741780)));
END
$$;
-- +goose StatementEnd

CREATE VIEW sidetrend.tracker_settings AS
SELECT t.name AS tracker, t.source_name AS source, t.time_col, t.value_col, t.key_cols,
       t.bucket, t.agg, t.empty, t.tz, t.degree, t.period, t.harmonics, t.lambda, t.auto_tune,
       t.burn_in, t.horizon, t.history_buckets, t.backfilled, t.status, t.last_error, t.created_at
FROM sidetrend.trackers t;

CREATE VIEW sidetrend.actuals AS
SELECT t.name AS tracker,
       p.series_key,
       p.bucket,
       sidetrend.bucket_start(p.bucket, t.bucket, t.tz) AS period_start,
       sidetrend.point_value(t.agg, p.n, p.sum, p.min, p.max, p.last_v) AS value,
       p.n AS rows,
       coalesce(p.bucket <= s.folded_through, false) AS folded
FROM sidetrend.points p
JOIN sidetrend.trackers t ON t.id = p.tracker_id
LEFT JOIN sidetrend.series s ON s.tracker_id = p.tracker_id AND s.series_key = p.series_key
WHERE p.n > 0;

CREATE VIEW sidetrend.accuracy AS
SELECT t.name AS tracker,
       s.series_key,
       s.n_errors,
       s.mae,
       s.rmse,
       s.mape,
       s.bias,
       s.coverage80,
       s.coverage95,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE s.folded_through IS NOT NULL;

-- Stored results of the lambda search. scope 'tracker' is all series of the
-- tracker together (series_key ''), scope 'series' one row per series.
CREATE TABLE sidetrend.tuning (
    tracker_id     int NOT NULL REFERENCES sidetrend.trackers (id) ON DELETE CASCADE,
    scope          text NOT NULL CHECK (scope IN ('tracker', 'series')),
    series_key     text NOT NULL DEFAULT '',
    lambda_before  float8,
    lambda         float8,
    memory_buckets float8,
    rmse_before    float8,
    rmse_after     float8,
    n_errors       bigint NOT NULL DEFAULT 0,
    series_count   int NOT NULL DEFAULT 0,
    points         bigint NOT NULL DEFAULT 0,
    curve_lambda   float8[],
    curve_rmse     float8[],
    degree         int,
    harmonics      int,
    models         jsonb,
    best_degree    int,
    best_harmonics int,
    note           text,
    computed_at    timestamptz NOT NULL DEFAULT now(),
    applied_at     timestamptz,
    PRIMARY KEY (tracker_id, scope, series_key)
);

CREATE TABLE sidetrend.tune_requests (
    id           bigserial PRIMARY KEY,
    tracker_id   int NOT NULL REFERENCES sidetrend.trackers (id) ON DELETE CASCADE,
    requested_by name NOT NULL DEFAULT session_user,
    requested_at timestamptz NOT NULL DEFAULT now()
);
CREATE INDEX tune_requests_tracker ON sidetrend.tune_requests (tracker_id);

CREATE TABLE sidetrend.surprises (
    id          bigserial PRIMARY KEY,
    tracker_id  int NOT NULL REFERENCES sidetrend.trackers (id) ON DELETE CASCADE,
    tracker     text NOT NULL,
    series_key  text NOT NULL,
    bucket      bigint NOT NULL,
    period_start timestamptz NOT NULL,
    kind        text NOT NULL CHECK (kind IN ('outside95', 'slope_turn')),
    actual      float8,
    yhat        float8,
    lo95        float8,
    hi95        float8,
    z           float8,
    slope       float8,
    slope_t     float8,
    direction   text CHECK (direction IN ('up', 'down')),
    detected_at timestamptz NOT NULL DEFAULT now(),
    UNIQUE (tracker_id, series_key, bucket, kind)
);
CREATE INDEX surprises_detected_at ON sidetrend.surprises (detected_at);

-- One row per series and issue bucket, the horizons as arrays: a row per
-- horizon would write H times more rows on every update (the cost that
-- dominated the drain when measured). The view below unnests them.
CREATE TABLE sidetrend.forecast_issues (
    tracker_id   int NOT NULL REFERENCES sidetrend.trackers (id) ON DELETE CASCADE,
    series_key   text NOT NULL,
    issued_for   bigint NOT NULL,
    yhat         float8[] NOT NULL,
    lo95         float8[] NOT NULL,
    hi95         float8[] NOT NULL,
    PRIMARY KEY (tracker_id, series_key, issued_for)
);

CREATE VIEW sidetrend.forecast_history AS
SELECT i.tracker_id, i.series_key, i.issued_for, f.horizon::int AS horizon,
       sidetrend.bucket_start(i.issued_for + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat, f.lo95, f.hi95
FROM sidetrend.forecast_issues i
JOIN sidetrend.trackers t ON t.id = i.tracker_id
CROSS JOIN LATERAL unnest(i.yhat, i.lo95, i.hi95) WITH ORDINALITY AS f(yhat, lo95, hi95, horizon);

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
GROUP BY t.name, h.series_key, h.horizon;

-- Who may track, untrack and tune: the session's role must be able to read
-- the source table (see the header). The schema owner, which runs the
-- triggers and the backfill, must be able to read it, create triggers on it,
-- and take the SHARE lock the backfill holds while it reads the table whole
-- (Postgres 15 asks UPDATE, DELETE or TRUNCATE for that lock mode).
-- +goose StatementBegin
CREATE FUNCTION sidetrend.check_tracker_access() RETURNS trigger
LANGUAGE plpgsql SET search_path = pg_catalog, pg_temp AS $$
DECLARE
    v_src oid := CASE WHEN TG_OP = 'DELETE' THEN OLD.source ELSE NEW.source END;
    v_rel text;
BEGIN
    SELECT format('%I.%I', n.nspname, c.relname) INTO v_rel
    FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace WHERE c.oid = v_src;
    IF v_rel IS NULL THEN
        -- The table is gone: untracking what is left is allowed.
        RETURN CASE WHEN TG_OP = 'DELETE' THEN OLD ELSE NEW END;
    END IF;
    IF NOT has_table_privilege(session_user, v_src, 'SELECT') THEN
        RAISE EXCEPTION 'role "%" may not read %, so it may not %', session_user, v_rel,
            CASE WHEN TG_OP = 'DELETE' THEN 'untrack it' ELSE 'track it' END
            USING ERRCODE = 'insufficient_privilege',
                  HINT = format('Forecasts are derived from the rows: tracking a table you cannot read would show its data. Ask its owner for GRANT SELECT ON %s TO %I.', v_rel, session_user);
    END IF;
    IF TG_OP = 'INSERT' THEN
        IF NOT has_table_privilege(current_user, v_src, 'SELECT')
           OR NOT has_table_privilege(current_user, v_src, 'TRIGGER') THEN
            RAISE EXCEPTION 'sidetrend''s role "%" may not read % or create triggers on it', current_user, v_rel
                USING ERRCODE = 'insufficient_privilege',
                      HINT = format('As the table''s owner, run GRANT SELECT, TRIGGER, UPDATE ON %s TO %I (UPDATE only because the backfill locks the table in SHARE mode while it reads it).', v_rel, current_user);
        END IF;
        IF NOT has_table_privilege(current_user, v_src, 'UPDATE, DELETE, TRUNCATE') THEN
            RAISE EXCEPTION 'sidetrend''s role "%" may not lock % for the backfill', current_user, v_rel
                USING ERRCODE = 'insufficient_privilege',
                      HINT = format('The backfill reads the table whole under a SHARE lock, which Postgres grants only with UPDATE, DELETE or TRUNCATE: as the table''s owner, run GRANT UPDATE ON %s TO %I.', v_rel, current_user);
        END IF;
    END IF;
    RETURN CASE WHEN TG_OP = 'DELETE' THEN OLD ELSE NEW END;
END
$$;
-- +goose StatementEnd

CREATE TRIGGER _sidetrend_access BEFORE INSERT OR DELETE ON sidetrend.trackers
    FOR EACH ROW EXECUTE FUNCTION sidetrend.check_tracker_access();

-- +goose StatementBegin
CREATE FUNCTION sidetrend.request_tune(name text) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    v_id  int;
    v_src oid;
BEGIN
    SELECT t.id, t.source INTO v_id, v_src FROM sidetrend.trackers t WHERE t.name = request_tune.name;
    IF v_id IS NULL THEN
        RAISE EXCEPTION 'no tracker named "%"', request_tune.name
            USING ERRCODE = 'undefined_object', HINT = 'See SELECT tracker FROM sidetrend.tracker_settings.';
    END IF;
    IF NOT coalesce(has_table_privilege(session_user, v_src, 'SELECT'), true) THEN
        RAISE EXCEPTION 'role "%" may not read the table tracker "%" follows, so it may not tune it', session_user, request_tune.name
            USING ERRCODE = 'insufficient_privilege';
    END IF;
    INSERT INTO sidetrend.tune_requests (tracker_id, requested_by) VALUES (v_id, session_user);
    -- Wake the sidecar; it tunes trackers with a request after its next catch-up.
    PERFORM pg_notify('sidetrend', v_id::text);
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.tune(name text, per_series bool DEFAULT false, apply bool DEFAULT false)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8)
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $fn$
#variable_conflict use_column
DECLARE
    t       sidetrend.trackers;
    g       sidetrend.tuning;
    v_scope text := CASE WHEN tune.per_series THEN 'series' ELSE 'tracker' END;
    v_at    timestamptz;
    v_n     int;
BEGIN
    SELECT * INTO t FROM sidetrend.trackers tr WHERE tr.name = tune.name;
    IF NOT FOUND THEN
        RAISE EXCEPTION 'no tracker named "%"', tune.name
            USING ERRCODE = 'undefined_object', HINT = 'See SELECT tracker FROM sidetrend.tracker_settings.';
    END IF;
    IF NOT coalesce(has_table_privilege(session_user, t.source, 'SELECT'), true) THEN
        RAISE EXCEPTION 'role "%" may not read %, so it may not tune tracker "%"', session_user, t.source_name, t.name
            USING ERRCODE = 'insufficient_privilege';
    END IF;
    SELECT min(x.computed_at), count(*) INTO v_at, v_n
    FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope;
    IF v_n = 0 THEN
        RAISE EXCEPTION 'no % tuning results yet for tracker "%"', CASE WHEN tune.per_series THEN 'per-series' ELSE 'tracker-wide' END, t.name
            USING ERRCODE = 'object_not_in_prerequisite_state',
                  HINT = format('Run `sidetrend tune --tracker %s%s`, or wait for the sidecar: it tunes after a backfill and after SELECT sidetrend.request_tune(%L).',
                                t.name, CASE WHEN tune.per_series THEN ' --per-series' ELSE '' END, t.name);
    END IF;
    RAISE NOTICE 'tuning results for tracker "%" computed at % on the data folded then', t.name, v_at;
    IF NOT tune.per_series THEN
        SELECT * INTO g FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = 'tracker';
        IF g.best_degree IS NOT NULL AND (g.best_degree, g.best_harmonics) IS DISTINCT FROM (t.degree, t.harmonics) THEN
            RAISE NOTICE 'a model with degree % and % harmonics had smaller one-step errors than the current one (degree %, % harmonics); run `sidetrend tune --tracker % --apply --model` to switch',
                g.best_degree, g.best_harmonics, t.degree, t.harmonics, t.name;
        END IF;
    END IF;
    IF tune.apply THEN
        IF tune.per_series THEN
            UPDATE sidetrend.series s SET lambda = x.lambda, rebuild = true
            FROM sidetrend.tuning x
            WHERE x.tracker_id = t.id AND x.scope = 'series' AND x.lambda IS NOT NULL
              AND s.tracker_id = t.id AND s.series_key = x.series_key;
        ELSE
            IF g.lambda IS NULL THEN
                RAISE EXCEPTION 'tracker "%" has no tuned lambda to apply: %', t.name, coalesce(g.note, 'no one-step errors were scored')
                    USING ERRCODE = 'object_not_in_prerequisite_state',
                          HINT = 'Wait until the series are longer than the parameters plus burn-in.';
            END IF;
            UPDATE sidetrend.trackers tr SET lambda = g.lambda WHERE tr.id = t.id;
            UPDATE sidetrend.series s SET lambda = NULL, rebuild = true WHERE s.tracker_id = t.id;
        END IF;
        UPDATE sidetrend.tuning x SET applied_at = now() WHERE x.tracker_id = t.id AND x.scope = v_scope;
        -- Wake the sidecar: it replays the series marked for rebuild.
        PERFORM pg_notify('sidetrend', t.id::text);
    END IF;
    RETURN QUERY
        SELECT CASE WHEN x.scope = 'series' THEN x.series_key END, x.lambda, x.memory_buckets, x.rmse_before, x.rmse_after
        FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope
        ORDER BY x.series_key;
END
$fn$;
-- +goose StatementEnd

-- create_roles makes the two roles for people when they do not exist and the
-- calling role may create roles; otherwise it says what to do and goes on.
-- +goose StatementBegin
CREATE FUNCTION sidetrend.create_roles(reader text DEFAULT 'sidetrend_reader', writer text DEFAULT 'sidetrend_writer')
RETURNS void
LANGUAGE plpgsql SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    r      text;
    v_can  boolean := (SELECT rolsuper OR rolcreaterole FROM pg_roles WHERE rolname = current_user);
BEGIN
    FOREACH r IN ARRAY ARRAY[create_roles.reader, create_roles.writer] LOOP
        CONTINUE WHEN EXISTS (SELECT 1 FROM pg_roles WHERE rolname = r);
        IF NOT v_can THEN
            RAISE NOTICE 'role "%" does not exist and role "%" may not create roles: skipped', r, current_user
                USING HINT = 'A role with CREATEROLE can run sql/roles.sql later; the grants follow with SELECT sidetrend.grant_roles().';
            CONTINUE;
        END IF;
        BEGIN
            EXECUTE format('CREATE ROLE %I NOLOGIN', r);
            EXECUTE format('COMMENT ON ROLE %I IS %L', r, CASE WHEN r = create_roles.reader
                THEN 'sidetrend: may read the views and the surprise and forecast logs'
                ELSE 'sidetrend: may read what sidetrend_reader reads and call track(), untrack(), tune() and request_tune()' END);
        EXCEPTION WHEN duplicate_object OR unique_violation THEN
            -- Created by a migration of another database at the same moment.
            NULL;
        END;
    END LOOP;
END
$fn$;
-- +goose StatementEnd

-- grant_roles gives the reader SELECT on every view of schema sidetrend and
-- on the two output logs, and the writer the same plus EXECUTE on the
-- functions that change what is tracked. Run it again after a migration that
-- adds a view; roles that do not exist are skipped with a notice.
-- +goose StatementBegin
CREATE FUNCTION sidetrend.grant_roles(reader text DEFAULT 'sidetrend_reader', writer text DEFAULT 'sidetrend_writer')
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
        EXECUTE format('GRANT SELECT ON sidetrend.surprises, sidetrend.forecast_history TO %I', r);
    END LOOP;
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = grant_roles.writer) THEN
        FOR v IN SELECT p.oid::regprocedure::text FROM pg_proc p
                 WHERE p.pronamespace = 'sidetrend'::regnamespace AND p.proname IN ('track', 'untrack', 'tune', 'request_tune') LOOP
            EXECUTE format('GRANT EXECUTE ON FUNCTION %s TO %I', v, grant_roles.writer);
        END LOOP;
    END IF;
END
$fn$;
-- +goose StatementEnd

-- track() and untrack() create and drop triggers and capture functions: they
-- run as the schema's owner so that a writer needs neither ownership of the
-- table nor rights on sidetrend's tables. Nobody but the writer role (and the
-- owner) may call them, tune() or the role helpers.
-- +goose StatementBegin
DO $$
DECLARE
    f text;
BEGIN
    FOR f IN SELECT p.oid::regprocedure::text FROM pg_proc p
             WHERE p.pronamespace = 'sidetrend'::regnamespace AND p.proname IN ('track', 'untrack') LOOP
        EXECUTE format('ALTER FUNCTION %s SECURITY DEFINER SET search_path = pg_catalog, pg_temp', f);
    END LOOP;
    FOR f IN SELECT p.oid::regprocedure::text FROM pg_proc p
             WHERE p.pronamespace = 'sidetrend'::regnamespace
               AND (p.proname IN ('track', 'untrack', 'tune', 'request_tune', 'install_capture',
                                  'create_roles', 'grant_roles', 'check_tracker_access')
                    OR p.proname LIKE '\_backfill\_%') LOOP
        EXECUTE format('REVOKE EXECUTE ON FUNCTION %s FROM PUBLIC', f);
    END LOOP;
END
$$;
-- +goose StatementEnd

SELECT sidetrend.create_roles();
SELECT sidetrend.grant_roles();

COMMENT ON FUNCTION sidetrend.point_value(text, bigint, float8, float8, float8, float8)
    IS 'The value of one bucket under an aggregate (sum, count, mean, min, max, last) from its n, sum, min, max and last value; NULL when the bucket holds no row.';
COMMENT ON FUNCTION sidetrend.bucket_ceil(timestamptz, interval, text)
    IS 'Index of the first bucket that starts at or after the instant: the first bucket of a period that starts there (budget recipes use it).';
COMMENT ON FUNCTION sidetrend.normal_cdf(float8)
    IS 'Standard normal distribution function Phi(x) (Marsaglia 2004 Taylor series, absolute error about 1e-15).';
COMMENT ON FUNCTION sidetrend.check_tracker_access()
    IS 'Trigger on sidetrend.trackers: the session role must be able to SELECT a table to track or untrack it, and sidetrend''s own role must be able to read it, create triggers on it and lock it for the backfill.';
COMMENT ON FUNCTION sidetrend.request_tune(text)
    IS 'Ask the sidecar to run the lambda search (and model comparison) for a tracker; read the results with sidetrend.tune() once it has.';
COMMENT ON FUNCTION sidetrend.tune(text, bool, bool)
    IS 'Stored lambda search results of a tracker: tracker-wide (series_key NULL) or per series, with memory 1/(1-lambda) in buckets and the RMSE of one-step errors at the lambda in use when they were computed (before) and at the chosen one (after). apply => true stores the lambda (trackers.lambda tracker-wide, series.lambda per series) and marks the series for replay. Errors when no results are stored yet.';
COMMENT ON FUNCTION sidetrend.create_roles(text, text)
    IS 'Create the reader and writer roles (NOLOGIN) when missing and the caller may create roles; otherwise a NOTICE says how to do it later.';
COMMENT ON FUNCTION sidetrend.grant_roles(text, text)
    IS 'Grant the reader SELECT on every sidetrend view and on surprises and forecast_history, and the writer the same plus EXECUTE on track, untrack, tune and request_tune. Missing roles are skipped with a NOTICE.';
COMMENT ON VIEW sidetrend.tracker_settings
    IS 'Each tracker: source table and columns, bucket width and zone, aggregate and empty-bucket policy, model (degree, period, harmonics, lambda; NULL lambda = chosen by the sidecar), horizon and history retention.';
COMMENT ON VIEW sidetrend.actuals
    IS 'Bucket values per series as the estimator sees them (the tracker''s aggregate applied), one row per bucket that holds rows; folded is false for a bucket not yet folded in (the open, newest one). Buckets without rows are absent: under empty = zero they count as 0.';
COMMENT ON VIEW sidetrend.accuracy
    IS 'One-step forecast errors e = actual - forecast issued one bucket earlier, scored only once a series was ready (after p + burn_in points). mae = mean |e|, rmse = sqrt(mean e^2), bias = mean e (positive: actuals above forecasts), mape = mean |e / actual| over non-zero actuals as a FRACTION (0.05 = 5 %), coverage80/95 = share of actuals inside the 80/95 % interval issued one step earlier, among errors that had an interval. NULL while warming up. as_of = start of the newest folded bucket.';
COMMENT ON VIEW sidetrend.accuracy_by_horizon
    IS 'Served forecasts (sidetrend.forecast_history) against the actual bucket values, per series and horizon: n forecasts whose bucket has been folded, mae, rmse, and coverage95 = share of actuals inside the 95 % interval. Under empty = zero a bucket without rows counts as 0; under gap it is left out.';
COMMENT ON TABLE sidetrend.tuning
    IS 'Results of the lambda search per tracker (scope tracker, all series together) and per series, written by `sidetrend tune` and by the sidecar; models holds the comparison with one simpler and one richer model on the same one-step errors.';
COMMENT ON TABLE sidetrend.tune_requests
    IS 'Trackers someone asked the sidecar to tune (sidetrend.request_tune); the sidecar deletes a request when it has stored the results.';
COMMENT ON TABLE sidetrend.surprises
    IS 'Surprises found while folding buckets: outside95 (actual outside the 95 % interval issued one step earlier; z = (actual - yhat) / se) and slope_turn (the slope direction changed from up to down or back; z = slope_t). Each is also sent as JSON with pg_notify(''sidetrend_surprise'').';
COMMENT ON TABLE sidetrend.forecast_issues
    IS 'Storage of sidetrend.forecast_history: one row per series and issue bucket, horizons as arrays.';
COMMENT ON VIEW sidetrend.forecast_history
    IS 'Forecasts as the sidecar served them: issued_for is the newest folded bucket N they were issued at, horizon h targets bucket N + h starting at period_start. Kept for trackers.history_buckets buckets of issue.';

-- +goose Down
-- +goose StatementBegin
DO $$
DECLARE
    f text;
BEGIN
    FOR f IN SELECT p.oid::regprocedure::text FROM pg_proc p
             WHERE p.pronamespace = 'sidetrend'::regnamespace AND p.proname IN ('track', 'untrack') LOOP
        EXECUTE format('ALTER FUNCTION %s SECURITY INVOKER RESET search_path', f);
        EXECUTE format('GRANT EXECUTE ON FUNCTION %s TO PUBLIC', f);
    END LOOP;
END
$$;
-- +goose StatementEnd
DROP TRIGGER IF EXISTS _sidetrend_access ON sidetrend.trackers;
DROP FUNCTION IF EXISTS sidetrend.grant_roles(text, text);
DROP FUNCTION IF EXISTS sidetrend.create_roles(text, text);
DROP FUNCTION IF EXISTS sidetrend.tune(text, bool, bool);
DROP FUNCTION IF EXISTS sidetrend.request_tune(text);
DROP FUNCTION IF EXISTS sidetrend.check_tracker_access();
DROP VIEW IF EXISTS sidetrend.accuracy_by_horizon;
DROP VIEW IF EXISTS sidetrend.forecast_history;
DROP TABLE IF EXISTS sidetrend.forecast_issues;
DROP TABLE IF EXISTS sidetrend.surprises;
DROP TABLE IF EXISTS sidetrend.tune_requests;
DROP TABLE IF EXISTS sidetrend.tuning;
DROP VIEW IF EXISTS sidetrend.accuracy;
DROP VIEW IF EXISTS sidetrend.actuals;
DROP VIEW IF EXISTS sidetrend.tracker_settings;
DROP FUNCTION IF EXISTS sidetrend.normal_cdf(float8);
DROP FUNCTION IF EXISTS sidetrend.bucket_ceil(timestamptz, interval, text);
DROP FUNCTION IF EXISTS sidetrend.point_value(text, bigint, float8, float8, float8, float8);
ALTER TABLE sidetrend.series DROP COLUMN IF EXISTS last_direction;
ALTER TABLE sidetrend.trackers DROP COLUMN IF EXISTS auto_tune, DROP COLUMN IF EXISTS history_buckets;
