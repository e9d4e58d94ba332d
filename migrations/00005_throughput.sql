-- Throughput of the drain and of the capture triggers.
--
-- sidetrend.forecast_issues loses its foreign key to trackers: the key check
-- on every inserted row (one per series and batch) cost about as much as the
-- insert itself. A trigger on trackers keeps what ON DELETE CASCADE did:
-- untracking deletes the tracker's forecast history. (sidetrend.points went
-- without a foreign key from the start, for the same reason.)
--
-- sidetrend.series keeps rows up to 8160 bytes inline. With eight forecast
-- arrays a row passed the default TOAST threshold (about 2 kB) from a
-- horizon of about 20 buckets on, and every update then tried to compress
-- the arrays (floats hardly compress) and moved them out of line: measured
-- with the pipeline benchmark at horizon 40, this setting gave 1.2x to 1.3x
-- the rows per second. (With four arrays, below, the threshold moves to a
-- horizon of about 40.)
--
-- sidetrend.series stores each forecast's standard errors and the two t
-- quantiles instead of its six interval bound arrays: the forecasts view
-- computes yhat -+ t SE with the same float8 operations in the same order
-- as the estimator (on amd64, where Go fuses no multiply-add, the same to
-- the last bit), and each update writes four arrays instead of eight. Ready
-- series are replayed once (rebuild) to fill the new columns; until then
-- their intervals read NULL.
--
-- sidetrend.install_capture writes faster capture triggers for trackers
-- tracked from now on: min and max are aggregated only for the min and max
-- aggregates (the others read neither), an insert or delete groups its
-- rows by hashing, an insert looks for rejects only when it took in fewer
-- rows than it wrote, and a single key column is the key as it is.
-- Existing trackers keep their triggers, which write the same changes
-- (apart from min and max that nothing reads); SELECT
-- sidetrend.install_capture(id) as the tables' owner reinstalls them. Down
-- keeps the new function for the same reason.

-- +goose Up
ALTER TABLE sidetrend.series SET (toast_tuple_target = 8160);

ALTER TABLE sidetrend.series
    ADD COLUMN se float8[], ADD COLUMN cum_se float8[], ADD COLUMN t80 float8, ADD COLUMN t95 float8;
COMMENT ON COLUMN sidetrend.series.se IS 'Standard error of each horizon''s forecast; the forecasts view forms yhat -+ t80 se and yhat -+ t95 se.';
COMMENT ON COLUMN sidetrend.series.cum_se IS 'Standard error of each cumulative forecast; cum_yhat -+ t95 cum_se is its 95 % interval.';
COMMENT ON COLUMN sidetrend.series.t80 IS 'Two-sided 80 % quantile of Student''s t with the state''s degrees of freedom.';
COMMENT ON COLUMN sidetrend.series.t95 IS 'Two-sided 95 % quantile of Student''s t with the state''s degrees of freedom.';

-- The bound is NULL where t * se would pass 1e300: float8 arithmetic in SQL
-- raises on overflow where the estimator gets an infinity (and served NULL).
CREATE OR REPLACE VIEW sidetrend.forecasts AS
SELECT t.name AS tracker,
       s.series_key,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(s.folded_through + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat,
       CASE WHEN f.se <= 1e300 / s.t80 THEN f.yhat - s.t80 * f.se END AS lo80,
       CASE WHEN f.se <= 1e300 / s.t80 THEN f.yhat + s.t80 * f.se END AS hi80,
       CASE WHEN f.se <= 1e300 / s.t95 THEN f.yhat - s.t95 * f.se END AS lo95,
       CASE WHEN f.se <= 1e300 / s.t95 THEN f.yhat + s.t95 * f.se END AS hi95,
       f.cum_yhat,
       CASE WHEN f.cum_se <= 1e300 / s.t95 THEN f.cum_yhat - s.t95 * f.cum_se END AS cum_lo95,
       CASE WHEN f.cum_se <= 1e300 / s.t95 THEN f.cum_yhat + s.t95 * f.cum_se END AS cum_hi95,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
CROSS JOIN LATERAL unnest(s.yhat, s.se, s.cum_yhat, s.cum_se)
    WITH ORDINALITY AS f(yhat, se, cum_yhat, cum_se, horizon)
WHERE s.ready;

UPDATE sidetrend.series SET rebuild = true WHERE ready;
ALTER TABLE sidetrend.series
    DROP COLUMN lo80, DROP COLUMN hi80, DROP COLUMN lo95, DROP COLUMN hi95, DROP COLUMN cum_lo95, DROP COLUMN cum_hi95;
ALTER TABLE sidetrend.forecast_issues DROP CONSTRAINT IF EXISTS forecast_issues_tracker_id_fkey;

-- +goose StatementBegin
CREATE FUNCTION sidetrend._forget_history() RETURNS trigger
LANGUAGE plpgsql AS $fn$
BEGIN
    DELETE FROM sidetrend.forecast_issues h USING gone g WHERE h.tracker_id = g.id;
    RETURN NULL;
END
$fn$;
-- +goose StatementEnd

CREATE TRIGGER _forget_history AFTER DELETE ON sidetrend.trackers
    REFERENCING OLD TABLE AS gone
    FOR EACH STATEMENT EXECUTE FUNCTION sidetrend._forget_history();

COMMENT ON FUNCTION sidetrend._forget_history()
    IS 'Deletes the forecast history of deleted trackers (what a foreign key with ON DELETE CASCADE did before migration 5).';

-- A single key column is its own series key: concat_ws of one argument
-- returns it unchanged, and the call cost a little on every captured row.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.series_key_expr(key_cols text[], rel text) RETURNS text
LANGUAGE sql IMMUTABLE AS $$
    SELECT CASE WHEN coalesce(cardinality(key_cols), 0) = 0 THEN $q$''$q$
        WHEN cardinality(key_cols) = 1 THEN format('coalesce(%s.%I::text, %L)', rel, key_cols[1], '')
        ELSE 'concat_ws(''|'', ' || (
            SELECT string_agg(format('coalesce(%s.%I::text, %L)', rel, c, ''), ', ' ORDER BY o)
            FROM unnest(key_cols) WITH ORDINALITY AS u(c, o)) || ')'
    END
$$;
-- +goose StatementEnd

COMMENT ON TABLE sidetrend.points
    IS 'Bucket aggregates per series: n and sum of the source rows in each bucket, min and max for min and max trackers, the last time and value for last trackers (NULL otherwise for trackers made after migration 5).';

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.install_capture(tracker_id int) RETURNS void
LANGUAGE plpgsql SET client_min_messages = warning AS $fn$
DECLARE
    t        sidetrend.trackers;
    v_vtype  regtype;
    v_t      text;
    v_v      text;
    v_tstz   text;
    v_valid  text;
    v_reason text;
    v_rows   text;
    v_sel    text;
    v_last   text;
    v_cap    text := format('sidetrend.%I', '_capture_' || install_capture.tracker_id);
    v_back   text := format('sidetrend.%I', '_backfill_' || install_capture.tracker_id);
    v_trg    text := '_sidetrend_' || install_capture.tracker_id;
    v_rec    text := format('sidetrend.%I', '_recompute_' || install_capture.tracker_id);
    v_trunc  text := format('sidetrend.%I', '_truncate_' || install_capture.tracker_id);
    v_rel    text;
    v_lo     text;
    v_hi     text;
    v_key    text;
    v_range  text;
BEGIN
    SELECT * INTO STRICT t FROM sidetrend.trackers WHERE id = install_capture.tracker_id;
    -- The schema-qualified name as of now (the table may have been renamed).
    SELECT format('%I.%I', n.nspname, c.relname) INTO STRICT v_rel
    FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace WHERE c.oid = t.source;
    UPDATE sidetrend.trackers SET source_name = v_rel WHERE id = t.id;
    SELECT a.atttypid::regtype INTO v_vtype FROM pg_attribute a
    WHERE a.attrelid = t.source AND a.attname = t.value_col AND NOT a.attisdropped;
    v_t := format('r.%I', t.time_col);
    v_v := format('r.%I', t.value_col);
    v_tstz := CASE t.time_type
        WHEN 'timestamptz' THEN v_t
        WHEN 'timestamp' THEN format('(%s AT TIME ZONE %L)', v_t, t.tz)
        ELSE format('(%s::timestamp AT TIME ZONE %L)', v_t, t.tz) END;
    -- A value is folded in when it is a finite float8; numeric is compared
    -- before the cast so that a huge numeric cannot make the cast fail.
    -- A row is folded in when its time is within years 1 to 9999 and its
    -- value is a finite number within +-1e150, so that its square (which the
    -- estimator forms) cannot overflow a float8. Numeric values are compared
    -- before the cast, so that a huge numeric cannot make the cast fail.
    v_lo := CASE t.time_type WHEN 'timestamptz' THEN '''0001-01-01 00:00:00+00''::timestamptz'
        WHEN 'timestamp' THEN '''0001-01-01''::timestamp' ELSE '''0001-01-01''::date' END;
    v_hi := CASE t.time_type WHEN 'timestamptz' THEN '''10000-01-01 00:00:00+00''::timestamptz'
        WHEN 'timestamp' THEN '''10000-01-01''::timestamp' ELSE '''10000-01-01''::date' END;
    v_valid := format('%1$s IS NOT NULL AND %1$s >= %4$s AND %1$s < %5$s AND %2$s IS NOT NULL AND %2$s %3$s',
        v_t, v_v,
        CASE WHEN v_vtype = 'numeric'::regtype THEN 'BETWEEN -1e150 AND 1e150'
             ELSE 'BETWEEN -1e150::float8 AND 1e150::float8' END,
        v_lo, v_hi);
    v_reason := format($r$CASE WHEN %1$s IS NULL THEN 'time is NULL'
        WHEN NOT isfinite(%1$s) THEN 'time is infinite'
        WHEN NOT (%1$s >= %3$s AND %1$s < %4$s) THEN 'time is outside the years 1 to 9999'
        WHEN %2$s IS NULL THEN 'value is NULL'
        WHEN %2$s::text = 'NaN' THEN 'value is NaN'
        WHEN %2$s::text IN ('Infinity', '-Infinity') THEN 'value is infinite'
        ELSE 'value is beyond +-1e150 (too large to fold in without overflow)' END$r$, v_t, v_v, v_lo, v_hi);
    v_key := sidetrend.series_key_expr(t.key_cols, 'r');
    -- The time range of bucket b in the column's own type, so that an index
    -- on the time column serves the recompute of one bucket. It is a
    -- superset for date columns; the bucket index test after it is exact.
    v_range := CASE t.time_type
        WHEN 'timestamptz' THEN format('%1$s >= sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AND %1$s < sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L)', v_t, t.bucket, t.tz)
        WHEN 'timestamp' THEN format('%1$s >= (sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AT TIME ZONE %3$L) AND %1$s < (sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L) AT TIME ZONE %3$L)', v_t, t.bucket, t.tz)
        ELSE format('%1$s >= (sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AT TIME ZONE %3$L)::date AND %1$s <= (sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L) AT TIME ZONE %3$L)::date', v_t, t.bucket, t.tz) END;
    v_last := CASE WHEN t.agg = 'last'
        THEN format('max(%1$s) AS lt, (array_agg(%2$s::float8 ORDER BY %1$s DESC, %2$s DESC))[1] AS lv', v_tstz, v_v)
        ELSE 'NULL::timestamptz AS lt, NULL::float8 AS lv' END;
    -- SELECT list grouped by series and bucket: key, bucket, n, sum, min, max, last_t, last_v.
    -- min and max only for the aggregates that read them: each is one more
    -- numeric-to-float8 conversion per row (migration 00005).
    v_sel := format('SELECT %s AS k, sidetrend.bucket_index(%s, %L::interval, %L) AS b, count(*) AS n, '
                    'sum(%s::float8) AS s, %s, %s',
        sidetrend.series_key_expr(t.key_cols, 'r'), v_t, t.bucket, t.tz, v_v,
        CASE WHEN t.agg IN ('min', 'max') THEN format('min(%1$s::float8) AS mn, max(%1$s::float8) AS mx', v_v)
             ELSE 'NULL::float8 AS mn, NULL::float8 AS mx' END,
        v_last);

    -- The INSERT and DELETE branches filter with coalesce(valid, false),
    -- which means the same as the bare condition: the planner estimated the
    -- bare range tests to keep a handful of rows, whatever the statement's
    -- size, and grouped them by sorting (a third of the trigger's time for a
    -- COPY of 100,000 rows); an opaque condition keeps an estimate that
    -- makes it hash (migration 00005).
    EXECUTE format($f$
CREATE OR REPLACE FUNCTION %1$s() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $body$
DECLARE
    v_folded bigint;
BEGIN
    IF TG_OP = 'INSERT' THEN
        -- The rows taken in are counted as they are grouped; the rejects
        -- scan (which evaluates the reason of each row) runs only when
        -- fewer than all rows were taken in.
        WITH ins AS (
            INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
            SELECT %2$s, g.* FROM (%3$s FROM new_rows r WHERE coalesce(%4$s, false) GROUP BY 1, 2) g
            RETURNING n)
        SELECT coalesce(sum(n), 0) INTO v_folded FROM ins;
        IF v_folded < (SELECT count(*) FROM new_rows) THEN
            INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
            SELECT %2$s, %5$s, to_jsonb(r) FROM new_rows r WHERE NOT coalesce(%4$s, false);
        END IF;
    ELSIF TG_OP = 'DELETE' THEN
        INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, retract)
        SELECT %2$s, g.k, g.b, -g.n, -g.s, g.mn, g.mx, NULL, NULL, true
        FROM (%3$s FROM old_rows r WHERE coalesce(%4$s, false) GROUP BY 1, 2) g;
    ELSE
        -- An UPDATE moves each row's contribution from its old series and
        -- bucket to its new one. Groups whose aggregates did not change (an
        -- update of another column) write nothing.
        INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
        SELECT %2$s, %5$s, to_jsonb(r) FROM new_rows r WHERE NOT coalesce(%4$s, false);
        WITH o AS (%3$s FROM old_rows r WHERE %4$s GROUP BY 1, 2),
             nw AS (%3$s FROM new_rows r WHERE %4$s GROUP BY 1, 2)
        INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, retract)
        SELECT %2$s, o.k, o.b, -o.n, -o.s, o.mn, o.mx, NULL, NULL, true FROM o
        WHERE NOT EXISTS (SELECT 1 FROM nw WHERE (nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv)
                          IS NOT DISTINCT FROM (o.k, o.b, o.n, o.s, o.mn, o.mx, o.lt, o.lv))
        UNION ALL
        SELECT %2$s, nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv, false FROM nw
        WHERE NOT EXISTS (SELECT 1 FROM o WHERE (nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv)
                          IS NOT DISTINCT FROM (o.k, o.b, o.n, o.s, o.mn, o.mx, o.lt, o.lv));
    END IF;
    PERFORM pg_notify('sidetrend', %6$L);
    RETURN NULL;
END
$body$$f$, v_cap, t.id, v_sel, v_valid, v_reason, t.id::text);

    -- Backfill: take in the table's current rows, for the whole tracker or
    -- for one series. SHARE mode blocks writers (not readers) while the
    -- table is read, so that no row is both in the log and in the scan.
    EXECUTE format($f$
CREATE OR REPLACE FUNCTION %1$s(only_key text DEFAULT NULL) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $body$
BEGIN
    LOCK TABLE %2$s IN SHARE MODE;
    DELETE FROM sidetrend.changes WHERE tracker_id = %3$s AND (only_key IS NULL OR series_key = only_key);
    DELETE FROM sidetrend.points WHERE tracker_id = %3$s AND (only_key IS NULL OR series_key = only_key);
    IF only_key IS NULL THEN
        DELETE FROM sidetrend.rejects WHERE tracker_id = %3$s;
        INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
        SELECT %3$s, %6$s, to_jsonb(r) FROM %2$s r WHERE NOT coalesce(%5$s, false);
    END IF;
    INSERT INTO sidetrend.points (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
    SELECT %3$s, g.* FROM (%4$s FROM %2$s r WHERE %5$s AND (only_key IS NULL OR %7$s = only_key) GROUP BY 1, 2) g;
    UPDATE sidetrend.series SET rebuild = true WHERE tracker_id = %3$s AND (only_key IS NULL OR series_key = only_key);
    INSERT INTO sidetrend.series (tracker_id, series_key, rebuild)
    SELECT DISTINCT %3$s, p.series_key, true FROM sidetrend.points p
    WHERE p.tracker_id = %3$s AND (only_key IS NULL OR p.series_key = only_key)
    ON CONFLICT ON CONSTRAINT series_pkey DO NOTHING;
    IF only_key IS NULL THEN
        UPDATE sidetrend.trackers SET backfilled = true WHERE id = %3$s;
    END IF;
END
$body$$f$, v_back, v_rel, t.id, v_sel, v_valid, v_reason, v_key);

    -- Recompute one bucket from the source: for min, max and last, whose
    -- value a delete cannot subtract.
    EXECUTE format($f$
CREATE OR REPLACE FUNCTION %1$s(only_key text, only_bucket bigint)
RETURNS TABLE (n bigint, s float8, mn float8, mx float8, lt timestamptz, lv float8)
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $body$
    SELECT g.n, g.s, g.mn, g.mx, g.lt, g.lv
    FROM (%2$s FROM %3$s r WHERE %4$s AND %5$s AND %6$s = only_key GROUP BY 1, 2) g
    WHERE g.b = only_bucket
$body$$f$, v_rec, v_sel, v_rel, v_valid, v_range, v_key);

    -- TRUNCATE empties the table: its series start over.
    EXECUTE format($f$
CREATE OR REPLACE FUNCTION %1$s() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $body$
BEGIN
    DELETE FROM sidetrend.changes WHERE tracker_id = %2$s;
    DELETE FROM sidetrend.points WHERE tracker_id = %2$s;
    UPDATE sidetrend.series SET rebuild = true WHERE tracker_id = %2$s;
    PERFORM pg_notify('sidetrend', %3$L);
    RETURN NULL;
END
$body$$f$, v_trunc, t.id, t.id::text);

    EXECUTE format('CREATE OR REPLACE TRIGGER %I AFTER TRUNCATE ON %s FOR EACH STATEMENT EXECUTE FUNCTION %s()',
                   v_trg || '_trunc', v_rel, v_trunc);
    EXECUTE format('CREATE OR REPLACE TRIGGER %I AFTER INSERT ON %s REFERENCING NEW TABLE AS new_rows '
                   'FOR EACH STATEMENT EXECUTE FUNCTION %s()', v_trg || '_ins', v_rel, v_cap);
    EXECUTE format('CREATE OR REPLACE TRIGGER %I AFTER UPDATE ON %s REFERENCING OLD TABLE AS old_rows NEW TABLE AS new_rows '
                   'FOR EACH STATEMENT EXECUTE FUNCTION %s()', v_trg || '_upd', v_rel, v_cap);
    EXECUTE format('CREATE OR REPLACE TRIGGER %I AFTER DELETE ON %s REFERENCING OLD TABLE AS old_rows '
                   'FOR EACH STATEMENT EXECUTE FUNCTION %s()', v_trg || '_del', v_rel, v_cap);
    -- The generated functions run with sidetrend's rights: nobody calls them
    -- directly (a trigger fires without an EXECUTE check).
    EXECUTE format('REVOKE ALL ON FUNCTION %s() FROM PUBLIC', v_cap);
    EXECUTE format('REVOKE ALL ON FUNCTION %s() FROM PUBLIC', v_trunc);
    EXECUTE format('REVOKE ALL ON FUNCTION %s(text) FROM PUBLIC', v_back);
    EXECUTE format('REVOKE ALL ON FUNCTION %s(text, bigint) FROM PUBLIC', v_rec);
END
$fn$;
-- +goose StatementEnd

-- +goose Down
-- (series_key_expr and install_capture keep their new bodies: they make the
-- same keys and the same changes.)
ALTER TABLE sidetrend.series RESET (toast_tuple_target);
ALTER TABLE sidetrend.series
    ADD COLUMN lo80 float8[], ADD COLUMN hi80 float8[], ADD COLUMN lo95 float8[], ADD COLUMN hi95 float8[],
    ADD COLUMN cum_lo95 float8[], ADD COLUMN cum_hi95 float8[];
CREATE OR REPLACE VIEW sidetrend.forecasts AS
SELECT t.name AS tracker,
       s.series_key,
       f.horizon::int AS horizon,
       sidetrend.bucket_start(s.folded_through + f.horizon, t.bucket, t.tz) AS period_start,
       f.yhat, f.lo80, f.hi80, f.lo95, f.hi95, f.cum_yhat, f.cum_lo95, f.cum_hi95,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
CROSS JOIN LATERAL unnest(s.yhat, s.lo80, s.hi80, s.lo95, s.hi95, s.cum_yhat, s.cum_lo95, s.cum_hi95)
    WITH ORDINALITY AS f(yhat, lo80, hi80, lo95, hi95, cum_yhat, cum_lo95, cum_hi95, horizon)
WHERE s.ready;
UPDATE sidetrend.series SET rebuild = true WHERE ready;
ALTER TABLE sidetrend.series DROP COLUMN se, DROP COLUMN cum_se, DROP COLUMN t80, DROP COLUMN t95;
COMMENT ON TABLE sidetrend.points IS 'Bucket aggregates per series: n, sum, min, max and last of the source rows in each bucket.';
DROP TRIGGER IF EXISTS _forget_history ON sidetrend.trackers;
DROP FUNCTION IF EXISTS sidetrend._forget_history();
DELETE FROM sidetrend.forecast_issues h
WHERE NOT EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.id = h.tracker_id);
ALTER TABLE sidetrend.forecast_issues
    ADD CONSTRAINT forecast_issues_tracker_id_fkey FOREIGN KEY (tracker_id)
    REFERENCES sidetrend.trackers (id) ON DELETE CASCADE;
