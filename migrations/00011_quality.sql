-- Component forgetting factors and model choice on held-out data (issue 14).
--
-- 1. sidetrend.trackers.season_lambda: the forgetting factor of the seasonal
--    terms; NULL means the same as lambda (one factor, as before). The
--    sidecar's tuning chooses it with the trend factor; `sidetrend tune
--    --apply` and sidetrend.tune(apply => true) store it.
-- 2. sidetrend.tuning gets season_lambda_before and season_lambda (the
--    seasonal factor in use and the chosen one; NULL: the same as lambda)
--    and at_bound (the settings whose chosen value sits on the edge of the
--    range searched, where the optimum may lie beyond; NULL when none).
--    rmse_before and rmse_after are now scored on the same buckets, the
--    series' first buckets (the warm-up) left out.
-- 3. sidetrend._tune_as applies the seasonal factor with the trend factor
--    and says when a setting sits on a bound. Its signature, its checks
--    (check_manage) and the SECURITY INVOKER wrapper sidetrend.tune() are
--    unchanged; the body is 00007's with those two changes.
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
    ADD COLUMN at_bound text;

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._tune_as(caller name, name text, per_series bool, apply bool)
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
        SELECT CASE WHEN x.scope = 'series' THEN x.series_key END, x.lambda, x.memory_buckets, x.rmse_before, x.rmse_after
        FROM sidetrend.tuning x WHERE x.tracker_id = t.id AND x.scope = v_scope
        ORDER BY x.series_key;
END
$fn$;
-- +goose StatementEnd

-- +goose Down
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._tune_as(caller name, name text, per_series bool, apply bool)
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
ALTER TABLE sidetrend.tuning DROP COLUMN at_bound, DROP COLUMN season_lambda, DROP COLUMN season_lambda_before;
ALTER TABLE sidetrend.trackers DROP COLUMN season_lambda;
