-- Component forgetting factors and model choice on held-out data (issue 14).
--
-- 1. sidetrend.trackers.season_lambda: the forgetting factor of the seasonal
--    terms; NULL means the same as lambda (one factor, as before). The
--    sidecar's tuning chooses it with the trend factor; `sidetrend tune
--    --apply` and sidetrend.tune(apply => true) store it.
-- 2. sidetrend.tuning gets season_lambda_before and season_lambda (the
--    seasonal factor in use and the chosen one; NULL: the same as lambda),
--    model_before and model (both models as text) and at_bound (the
--    settings whose chosen value sits on the edge of the range searched,
--    where the optimum may lie beyond; NULL when none). rmse_before and
--    rmse_after are now scored on the same buckets, the series' first
--    buckets (the warm-up) left out.
-- 3. sidetrend.tune() and sidetrend._tune_as return those too, after the
--    columns they had (a query naming the old columns still works). A
--    function's result type cannot change in place, so both are dropped and
--    created again: _tune_as is 00007's body with the seasonal factor in
--    the apply path, the bound notice and the new columns; its checks
--    (check_manage) are unchanged; tune() is still the SECURITY INVOKER
--    wrapper. EXECUTE is revoked from PUBLIC and granted again by
--    sidetrend.grant_roles(), as migration 00007 does.
--
-- Stored states of trackers without a seasonal factor are unchanged (the
-- estimator still reads encoding version 1 and writes version 2).

-- +goose Up
ALTER TABLE sidetrend.trackers ADD COLUMN season_lambda float8
    CHECK (season_lambda > 0 AND season_lambda <= 1);
COMMENT ON COLUMN sidetrend.trackers.season_lambda IS
    'forgetting factor of the seasonal terms; NULL: the same as lambda';
ALTER TABLE sidetrend.tuning
    ADD COLUMN season_lambda_before float8,
    ADD COLUMN season_lambda float8,
    ADD COLUMN model_before text,
    ADD COLUMN model text,
    ADD COLUMN at_bound text;

DROP FUNCTION sidetrend.tune(text, bool, bool);
DROP FUNCTION sidetrend._tune_as(name, text, bool, bool);

-- +goose StatementBegin
CREATE FUNCTION sidetrend._tune_as(caller name, name text, per_series bool, apply bool)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8,
               season_lambda float8, model_before text, model text, n_errors bigint, at_bound text)
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $fn$
#variable_conflict use_column
DECLARE
    t       sidetrend.trackers := sidetrend.find_tracker(_tune_as.name);
    g       sidetrend.tuning;
    v_scope text := CASE WHEN _tune_as.per_series THEN 'series' ELSE 'tracker' END;
    v_at    timestamptz;
    v_n     int;
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'tune', true);
    SELECT min(x.computed_at), count(*) INTO v_at, v_n
    FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope;
    IF v_n = 0 THEN
        RAISE EXCEPTION 'no % tuning results yet for tracker "%"', CASE WHEN _tune_as.per_series THEN 'per-series' ELSE 'tracker-wide' END, t.name
            USING ERRCODE = 'object_not_in_prerequisite_state',
                  HINT = format('Run `sidetrend tune --tracker %s%s`, or wait for the sidecar: it tunes after a backfill and after SELECT sidetrend.request_tune(%L).',
                                t.name, CASE WHEN _tune_as.per_series THEN ' --per-series' ELSE '' END, t.name);
    END IF;
    RAISE NOTICE 'tuning results for tracker "%" computed at % on the data folded then', t.name, v_at;
    IF NOT _tune_as.per_series THEN
        SELECT * INTO g FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = 'tracker';
        IF g.best_degree IS NOT NULL AND (g.best_degree, g.best_harmonics) IS DISTINCT FROM (t.degree, t.harmonics) THEN
            RAISE NOTICE 'a model with degree % and % harmonics had smaller one-step errors than the current one (degree %, % harmonics); run `sidetrend tune --tracker % --apply --model` to switch',
                g.best_degree, g.best_harmonics, t.degree, t.harmonics, t.name;
        END IF;
        IF g.at_bound IS NOT NULL THEN
            RAISE NOTICE 'tracker "%": %; the best setting may lie beyond it', t.name, g.at_bound;
        END IF;
    END IF;
    IF _tune_as.apply THEN
        IF _tune_as.per_series THEN
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
            UPDATE sidetrend.trackers tr SET lambda = g.lambda, season_lambda = g.season_lambda WHERE tr.id = t.id;
            UPDATE sidetrend.series s SET lambda = NULL, rebuild = true WHERE s.tracker_id = t.id;
        END IF;
        UPDATE sidetrend.tuning x SET applied_at = now() WHERE x.tracker_id = t.id AND x.scope = v_scope;
        -- Wake the sidecar: it replays the series marked for rebuild.
        PERFORM pg_notify('sidetrend', t.id::text);
    END IF;
    RETURN QUERY
        SELECT CASE WHEN x.scope = 'series' THEN x.series_key END, x.lambda, x.memory_buckets, x.rmse_before, x.rmse_after,
               x.season_lambda, x.model_before, x.model, x.n_errors, x.at_bound
        FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope
        ORDER BY x.series_key;
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.tune(name text, per_series bool DEFAULT false, apply bool DEFAULT false)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8,
               season_lambda float8, model_before text, model text, n_errors bigint, at_bound text)
LANGUAGE sql SECURITY INVOKER
BEGIN ATOMIC
    SELECT * FROM sidetrend._tune_as(current_user, name, per_series, apply);
END;
-- +goose StatementEnd
REVOKE EXECUTE ON FUNCTION sidetrend._tune_as(name, text, bool, bool) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.tune(text, bool, bool) FROM PUBLIC;
ALTER FUNCTION sidetrend.tune(text, bool, bool) SECURITY INVOKER RESET ALL;
-- The writer role gets EXECUTE on both again (grant_roles grants by name).
SELECT sidetrend.grant_roles();
COMMENT ON FUNCTION sidetrend.tune(text, bool, bool) IS
    'stored tuning of a tracker (per_series: of each series): the chosen factors with the RMSE of the model in use and of the chosen one over the same buckets, the models as text, the errors scored and the settings on a bound; apply => true stores the chosen factors and replays the series';

-- +goose Down
DROP FUNCTION sidetrend.tune(text, bool, bool);
DROP FUNCTION sidetrend._tune_as(name, text, bool, bool);
-- +goose StatementBegin
CREATE FUNCTION sidetrend._tune_as(caller name, name text, per_series bool, apply bool)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8)
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $fn$
#variable_conflict use_column
DECLARE
    t       sidetrend.trackers := sidetrend.find_tracker(_tune_as.name);
    g       sidetrend.tuning;
    v_scope text := CASE WHEN _tune_as.per_series THEN 'series' ELSE 'tracker' END;
    v_at    timestamptz;
    v_n     int;
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'tune', true);
    SELECT min(x.computed_at), count(*) INTO v_at, v_n
    FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope;
    IF v_n = 0 THEN
        RAISE EXCEPTION 'no % tuning results yet for tracker "%"', CASE WHEN _tune_as.per_series THEN 'per-series' ELSE 'tracker-wide' END, t.name
            USING ERRCODE = 'object_not_in_prerequisite_state',
                  HINT = format('Run `sidetrend tune --tracker %s%s`, or wait for the sidecar: it tunes after a backfill and after SELECT sidetrend.request_tune(%L).',
                                t.name, CASE WHEN _tune_as.per_series THEN ' --per-series' ELSE '' END, t.name);
    END IF;
    RAISE NOTICE 'tuning results for tracker "%" computed at % on the data folded then', t.name, v_at;
    IF NOT _tune_as.per_series THEN
        SELECT * INTO g FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = 'tracker';
        IF g.best_degree IS NOT NULL AND (g.best_degree, g.best_harmonics) IS DISTINCT FROM (t.degree, t.harmonics) THEN
            RAISE NOTICE 'a model with degree % and % harmonics had smaller one-step errors than the current one (degree %, % harmonics); run `sidetrend tune --tracker % --apply --model` to switch',
                g.best_degree, g.best_harmonics, t.degree, t.harmonics, t.name;
        END IF;
    END IF;
    IF _tune_as.apply THEN
        IF _tune_as.per_series THEN
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

-- +goose StatementBegin
CREATE FUNCTION sidetrend.tune(name text, per_series bool DEFAULT false, apply bool DEFAULT false)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8)
LANGUAGE sql SECURITY INVOKER
BEGIN ATOMIC
    SELECT * FROM sidetrend._tune_as(current_user, name, per_series, apply);
END;
-- +goose StatementEnd
REVOKE EXECUTE ON FUNCTION sidetrend._tune_as(name, text, bool, bool) FROM PUBLIC;
REVOKE EXECUTE ON FUNCTION sidetrend.tune(text, bool, bool) FROM PUBLIC;
ALTER FUNCTION sidetrend.tune(text, bool, bool) SECURITY INVOKER RESET ALL;
-- The writer role gets EXECUTE on both again (grant_roles grants by name).
SELECT sidetrend.grant_roles();
COMMENT ON FUNCTION sidetrend.tune(text, bool, bool)
    IS 'Stored lambda search results of a tracker: tracker-wide (series_key NULL) or per series, with memory 1/(1-lambda) in buckets and the RMSE of one-step errors at the lambda in use when they were computed (before) and at the chosen one (after). apply => true stores the lambda (trackers.lambda tracker-wide, series.lambda per series) and marks the series for replay. Errors when no results are stored yet.';
ALTER TABLE sidetrend.tuning DROP COLUMN at_bound, DROP COLUMN model, DROP COLUMN model_before,
    DROP COLUMN season_lambda, DROP COLUMN season_lambda_before;
ALTER TABLE sidetrend.trackers DROP COLUMN season_lambda;
