-- Core tables, registration and capture.
--
-- sidetrend.trackers  one row per tracked (table, model)
-- sidetrend.changes   the durable change log the capture triggers append to
-- sidetrend.points    bucket aggregates per series (the truth replays start from)
-- sidetrend.series    one row per series: estimator state plus forecast arrays
-- sidetrend.rejects   source rows that could not be folded in, with the reason

-- +goose Up
CREATE TABLE sidetrend.trackers (
    id          serial PRIMARY KEY,
    name        text NOT NULL UNIQUE,
    source      oid NOT NULL,
    source_name text NOT NULL,
    time_col    text NOT NULL,
    time_type   text NOT NULL CHECK (time_type IN ('timestamptz', 'timestamp', 'date')),
    value_col   text NOT NULL,
    key_cols    text[] NOT NULL DEFAULT '{}',
    bucket      interval NOT NULL,
    agg         text NOT NULL CHECK (agg IN ('sum', 'mean', 'min', 'max', 'last', 'count')),
    degree      int NOT NULL,
    period      float8,
    harmonics   int NOT NULL DEFAULT 0,
    lambda      float8,
    burn_in     int NOT NULL DEFAULT 0,
    horizon     int NOT NULL,
    empty       text NOT NULL CHECK (empty IN ('zero', 'gap')),
    tz          text NOT NULL,
    backfilled  boolean NOT NULL DEFAULT false,
    status      text NOT NULL DEFAULT 'active' CHECK (status IN ('active', 'broken')),
    last_error  text,
    created_at  timestamptz NOT NULL DEFAULT now()
);

CREATE TABLE sidetrend.changes (
    id          bigserial PRIMARY KEY,
    tracker_id  int NOT NULL,
    series_key  text NOT NULL,
    bucket      bigint NOT NULL,
    n           bigint NOT NULL,
    sum         float8 NOT NULL,
    min         float8,
    max         float8,
    last_t      timestamptz,
    last_v      float8,
    retract     boolean NOT NULL DEFAULT false,
    at          timestamptz NOT NULL DEFAULT now()
);

-- No foreign key to trackers: its check on every upserted point cost as much
-- as the upsert itself; the drain joins trackers, and untrack deletes points.
CREATE TABLE sidetrend.points (
    tracker_id  int NOT NULL,
    series_key  text NOT NULL,
    bucket      bigint NOT NULL,
    n           bigint NOT NULL,
    sum         float8 NOT NULL,
    min         float8,
    max         float8,
    last_t      timestamptz,
    last_v      float8,
    dirty       boolean NOT NULL DEFAULT false,
    PRIMARY KEY (tracker_id, series_key, bucket)
) WITH (fillfactor = 80);

CREATE TABLE sidetrend.series (
    tracker_id     int NOT NULL REFERENCES sidetrend.trackers (id) ON DELETE CASCADE,
    series_key     text NOT NULL,
    folded_through bigint,
    first_bucket   bigint,
    points         bigint NOT NULL DEFAULT 0,
    state          bytea,
    ready          boolean NOT NULL DEFAULT false,
    rebuild        boolean NOT NULL DEFAULT false,
    pending_due    timestamptz,
    updated_at     timestamptz,
    lambda         float8,
    yhat           float8[],
    lo80           float8[],
    hi80           float8[],
    lo95           float8[],
    hi95           float8[],
    cum_yhat       float8[],
    cum_lo95       float8[],
    cum_hi95       float8[],
    level          float8,
    slope          float8,
    slope_se       float8,
    sigma          float8,
    n_errors       bigint,
    mae            float8,
    rmse           float8,
    mape           float8,
    bias           float8,
    coverage80     float8,
    coverage95     float8,
    last_error     text,
    PRIMARY KEY (tracker_id, series_key)
) WITH (fillfactor = 50);

CREATE TABLE sidetrend.rejects (
    id          bigserial PRIMARY KEY,
    tracker_id  int NOT NULL,
    reason      text NOT NULL,
    row_data    jsonb,
    at          timestamptz NOT NULL DEFAULT now()
);

-- +goose StatementBegin
CREATE FUNCTION sidetrend.series_key_expr(key_cols text[], rel text) RETURNS text
LANGUAGE sql IMMUTABLE AS $$
    SELECT CASE WHEN coalesce(cardinality(key_cols), 0) = 0 THEN $q$''$q$
        ELSE 'concat_ws(''|'', ' || (
            SELECT string_agg(format('coalesce(%s.%I::text, %L)', rel, c, ''), ', ' ORDER BY o)
            FROM unnest(key_cols) WITH ORDINALITY AS u(c, o)) || ')'
    END
$$;
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
    burn_in    int DEFAULT 0
) RETURNS int
LANGUAGE plpgsql AS $fn$
DECLARE
    v_kind     "char";
    v_relname  text;
    v_ttype    regtype;
    v_vtype    regtype;
    v_time     text;
    v_id       int;
    v_name     text := coalesce(track.name, (SELECT c.relname FROM pg_class c WHERE c.oid = track.source));
    v_empty    text := coalesce(track.empty, CASE WHEN track.agg IN ('sum', 'count') THEN 'zero' ELSE 'gap' END);
    v_cols     text;
    c          text;
BEGIN
    SELECT c.relkind, format('%I.%I', n.nspname, c.relname) INTO v_kind, v_relname
    FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace WHERE c.oid = track.source;
    IF v_kind = 'v' OR v_kind = 'm' THEN
        RAISE EXCEPTION 'cannot track %: it is a view', v_relname
            USING ERRCODE = 'wrong_object_type', HINT = 'Track the table the view reads from; triggers on a view do not see writes to its tables.';
    ELSIF v_kind NOT IN ('r', 'p') THEN
        RAISE EXCEPTION 'cannot track %: it is not a table', v_relname
            USING ERRCODE = 'wrong_object_type', HINT = 'Only tables and partitioned tables can be tracked.';
    END IF;
    SELECT string_agg(quote_ident(a.attname), ', ' ORDER BY a.attnum) INTO v_cols
    FROM pg_attribute a WHERE a.attrelid = track.source AND a.attnum > 0 AND NOT a.attisdropped;

    SELECT a.atttypid::regtype INTO v_ttype FROM pg_attribute a
    WHERE a.attrelid = track.source AND a.attname = track.time_col AND a.attnum > 0 AND NOT a.attisdropped;
    IF v_ttype IS NULL THEN
        RAISE EXCEPTION 'column "%" does not exist in %', track.time_col, v_relname
            USING ERRCODE = 'undefined_column', HINT = format('Pass time_col => one of: %s.', v_cols);
    END IF;
    v_time := CASE v_ttype
        WHEN 'timestamp with time zone'::regtype THEN 'timestamptz'
        WHEN 'timestamp without time zone'::regtype THEN 'timestamp'
        WHEN 'date'::regtype THEN 'date' END;
    IF v_time IS NULL THEN
        RAISE EXCEPTION 'time column "%" of % has type %, not date, timestamp or timestamptz', track.time_col, v_relname, v_ttype
            USING ERRCODE = 'datatype_mismatch', HINT = 'Pass a date or timestamp column as time_col, or add a generated column that casts it.';
    END IF;

    SELECT a.atttypid::regtype INTO v_vtype FROM pg_attribute a
    WHERE a.attrelid = track.source AND a.attname = track.value_col AND a.attnum > 0 AND NOT a.attisdropped;
    IF v_vtype IS NULL THEN
        RAISE EXCEPTION 'column "%" does not exist in %', track.value_col, v_relname
            USING ERRCODE = 'undefined_column', HINT = format('Pass value_col => one of: %s.', v_cols);
    END IF;
    IF v_vtype NOT IN ('smallint'::regtype, 'integer'::regtype, 'bigint'::regtype, 'real'::regtype,
                       'double precision'::regtype, 'numeric'::regtype) THEN
        RAISE EXCEPTION 'value column "%" of % has type %, which is not numeric', track.value_col, v_relname, v_vtype
            USING ERRCODE = 'datatype_mismatch', HINT = 'Pass a smallint, integer, bigint, real, double precision or numeric column as value_col.';
    END IF;

    FOREACH c IN ARRAY coalesce(track.key_cols, '{}') LOOP
        IF NOT EXISTS (SELECT 1 FROM pg_attribute a WHERE a.attrelid = track.source AND a.attname = c
                       AND a.attnum > 0 AND NOT a.attisdropped) THEN
            RAISE EXCEPTION 'key column "%" does not exist in %', c, v_relname
                USING ERRCODE = 'undefined_column', HINT = format('Pass key_cols => columns among: %s.', v_cols);
        END IF;
    END LOOP;

    PERFORM sidetrend.bucket_check(track.bucket);
    IF track.agg IS NULL OR track.agg NOT IN ('sum', 'mean', 'min', 'max', 'last', 'count') THEN
        RAISE EXCEPTION 'unknown aggregate "%"', track.agg
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use agg => sum, mean, min, max, last or count.';
    END IF;
    IF v_empty NOT IN ('zero', 'gap') THEN
        RAISE EXCEPTION 'empty => "%" is not known', track.empty
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use empty => ''zero'' (no rows means 0) or ''gap'' (no rows means no information).';
    END IF;
    -- Only region names (and UTC): Postgres reads short names such as CET as
    -- fixed offsets in AT TIME ZONE, which would disagree with the calendar.
    PERFORM sidetrend.zone_check(track.tz);
    IF track.degree IS NULL OR track.degree < 0 OR track.degree > 3 THEN
        RAISE EXCEPTION 'degree % is not supported', track.degree
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a polynomial degree from 0 to 3 (1 is a local linear trend).';
    END IF;
    IF track.lambda IS NOT NULL AND NOT (track.lambda > 0 AND track.lambda <= 1) THEN
        RAISE EXCEPTION 'lambda % is outside (0, 1]', track.lambda
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a forgetting factor such as 0.95 (1 means no forgetting).';
    END IF;
    IF track.period IS NULL AND coalesce(track.harmonics, 0) <> 0 THEN
        RAISE EXCEPTION '% harmonics need a period', track.harmonics
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Pass period => the seasonal period in buckets (7 for weekly in days), or harmonics => 0.';
    END IF;
    IF track.period IS NOT NULL THEN
        IF NOT (track.period >= 2) OR track.period = 'Infinity'::float8 THEN
            RAISE EXCEPTION 'period % is too short', track.period
                USING ERRCODE = 'invalid_parameter_value', HINT = 'A seasonal period must be at least 2 buckets.';
        END IF;
        IF track.harmonics IS NULL OR track.harmonics < 1 OR track.harmonics > 6 THEN
            RAISE EXCEPTION '% harmonics are not supported with a period', track.harmonics
                USING ERRCODE = 'invalid_parameter_value', HINT = 'Use harmonics => 1 to 6.';
        END IF;
        IF track.harmonics > track.period / 2 THEN
            RAISE EXCEPTION '% harmonics are too many for period %', track.harmonics, track.period
                USING ERRCODE = 'invalid_parameter_value', HINT = format('Use at most %s harmonics (period/2).', floor(track.period / 2));
        END IF;
    END IF;
    IF track.horizon IS NULL OR track.horizon < 1 OR track.horizon > 1000 THEN
        RAISE EXCEPTION 'horizon % is out of range', track.horizon
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a horizon of 1 to 1000 buckets (the live endpoint serves longer ones).';
    END IF;
    IF track.burn_in IS NULL OR track.burn_in < 0 THEN
        RAISE EXCEPTION 'burn_in % is negative', track.burn_in
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use burn_in => 0 or more points.';
    END IF;
    IF EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.name = v_name) THEN
        RAISE EXCEPTION 'a tracker named "%" already exists', v_name
            USING ERRCODE = 'duplicate_object', HINT = 'Pass name => a new name, or call sidetrend.untrack first.';
    END IF;

    INSERT INTO sidetrend.trackers (name, source, source_name, time_col, time_type, value_col, key_cols, bucket, agg,
                                    degree, period, harmonics, lambda, burn_in, horizon, empty, tz)
    VALUES (v_name, track.source, v_relname, track.time_col, v_time, track.value_col, coalesce(track.key_cols, '{}'),
            track.bucket, track.agg, track.degree, track.period, coalesce(track.harmonics, 0), track.lambda,
            track.burn_in, track.horizon, v_empty, track.tz)
    RETURNING id INTO v_id;

    PERFORM sidetrend.install_capture(v_id);
    RETURN v_id;
END
$fn$;
-- +goose StatementEnd

-- install_capture (re)creates the capture function, the backfill function
-- and the triggers of one tracker from its row in sidetrend.trackers. Every
-- identifier goes through format('%I') or quote_ident; literals through %L.
-- +goose StatementBegin
CREATE FUNCTION sidetrend.install_capture(tracker_id int) RETURNS void
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
    v_sel := format('SELECT %s AS k, sidetrend.bucket_index(%s, %L::interval, %L) AS b, count(*) AS n, '
                    'sum(%s::float8) AS s, min(%s::float8) AS mn, max(%s::float8) AS mx, %s',
        sidetrend.series_key_expr(t.key_cols, 'r'), v_t, t.bucket, t.tz, v_v, v_v, v_v, v_last);

    EXECUTE format($f$
CREATE OR REPLACE FUNCTION %1$s() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $body$
BEGIN
    IF TG_OP = 'INSERT' THEN
        INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
        SELECT %2$s, %5$s, to_jsonb(r) FROM new_rows r WHERE NOT coalesce(%4$s, false);
        INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
        SELECT %2$s, g.* FROM (%3$s FROM new_rows r WHERE %4$s GROUP BY 1, 2) g;
    ELSIF TG_OP = 'DELETE' THEN
        INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, retract)
        SELECT %2$s, g.k, g.b, -g.n, -g.s, g.mn, g.mx, NULL, NULL, true
        FROM (%3$s FROM old_rows r WHERE %4$s GROUP BY 1, 2) g;
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

-- +goose StatementBegin
CREATE FUNCTION sidetrend.untrack(name text) RETURNS void
LANGUAGE plpgsql SET client_min_messages = warning AS $fn$
DECLARE
    t sidetrend.trackers;
BEGIN
    SELECT * INTO t FROM sidetrend.trackers WHERE trackers.name = untrack.name;
    IF NOT FOUND THEN
        RAISE EXCEPTION 'no tracker named "%"', untrack.name
            USING ERRCODE = 'undefined_object', HINT = 'See SELECT name FROM sidetrend.trackers.';
    END IF;
    -- Dropping the trigger functions CASCADE drops their triggers; unlike
    -- DROP TRIGGER it needs no ownership of the source table.
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I() CASCADE', '_capture_' || t.id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I() CASCADE', '_truncate_' || t.id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I(text)', '_backfill_' || t.id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I(text, bigint)', '_recompute_' || t.id);
    DELETE FROM sidetrend.resync WHERE tracker_id = t.id;
    DELETE FROM sidetrend.points WHERE tracker_id = t.id;
    DELETE FROM sidetrend.changes WHERE tracker_id = t.id;
    DELETE FROM sidetrend.rejects WHERE tracker_id = t.id;
    DELETE FROM sidetrend.trackers WHERE id = t.id;
END
$fn$;
-- +goose StatementEnd

CREATE TABLE sidetrend.resync (
    tracker_id  int NOT NULL,
    series_key  text NOT NULL,
    at          timestamptz NOT NULL DEFAULT now(),
    PRIMARY KEY (tracker_id, series_key)
);

-- +goose StatementBegin
CREATE FUNCTION sidetrend.rebuild(name text, series_key text DEFAULT NULL) RETURNS void
LANGUAGE plpgsql AS $fn$
DECLARE
    v_id int;
BEGIN
    SELECT id INTO v_id FROM sidetrend.trackers t WHERE t.name = rebuild.name;
    IF NOT FOUND THEN
        RAISE EXCEPTION 'no tracker named "%"', rebuild.name
            USING ERRCODE = 'undefined_object', HINT = 'See SELECT name FROM sidetrend.trackers.';
    END IF;
    IF rebuild.series_key IS NULL THEN
        UPDATE sidetrend.trackers SET backfilled = false WHERE id = v_id;
    ELSE
        INSERT INTO sidetrend.resync (tracker_id, series_key) VALUES (v_id, rebuild.series_key)
        ON CONFLICT DO NOTHING;
    END IF;
    PERFORM pg_notify('sidetrend', v_id::text);
END
$fn$;
-- +goose StatementEnd

-- recompute_dirty recomputes from the source every point of one tracker
-- that a delete or update made dirty (min, max and last cannot subtract).
-- +goose StatementBegin
CREATE FUNCTION sidetrend.recompute_dirty(tracker_id int) RETURNS int
LANGUAGE plpgsql AS $fn$
DECLARE
    p record;
    r record;
    v_n int := 0;
BEGIN
    FOR p IN SELECT pt.series_key, pt.bucket FROM sidetrend.points pt
             WHERE pt.tracker_id = recompute_dirty.tracker_id AND pt.dirty
             ORDER BY 1, 2 LOOP
        EXECUTE format('SELECT * FROM sidetrend.%I($1, $2)', '_recompute_' || recompute_dirty.tracker_id)
            INTO r USING p.series_key, p.bucket;
        IF r.n IS NULL THEN
            DELETE FROM sidetrend.points pt
            WHERE pt.tracker_id = recompute_dirty.tracker_id AND pt.series_key = p.series_key AND pt.bucket = p.bucket;
        ELSE
            UPDATE sidetrend.points pt SET n = r.n, sum = r.s, min = r.mn, max = r.mx, last_t = r.lt, last_v = r.lv, dirty = false
            WHERE pt.tracker_id = recompute_dirty.tracker_id AND pt.series_key = p.series_key AND pt.bucket = p.bucket;
        END IF;
        v_n := v_n + 1;
    END LOOP;
    RETURN v_n;
END
$fn$;
-- +goose StatementEnd

CREATE VIEW sidetrend.forecasts AS
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

CREATE VIEW sidetrend.slopes AS
SELECT t.name AS tracker,
       s.series_key,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS as_of,
       s.level,
       s.slope,
       s.slope_se,
       CASE WHEN s.slope = 0 AND s.slope_se = 0 THEN 0 ELSE s.slope / nullif(s.slope_se, 0) END AS slope_t,
       s.slope / nullif(s.level, 0) AS slope_pct,
       CASE WHEN s.slope_se IS NULL OR s.slope_se = 0 OR abs(s.slope / s.slope_se) < 2 THEN 'flat'
            WHEN s.slope > 0 THEN 'up' ELSE 'down' END AS direction
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id
WHERE s.ready;

CREATE VIEW sidetrend.series_status AS
SELECT t.name AS tracker,
       s.series_key,
       s.points,
       sidetrend.bucket_start(s.folded_through, t.bucket, t.tz) AS last_bucket,
       CASE WHEN s.ready THEN 'ready' ELSE 'warming' END AS state,
       coalesce(extract(epoch FROM now() - (SELECT min(c.at) FROM sidetrend.changes c
                 WHERE c.tracker_id = s.tracker_id AND c.series_key = s.series_key)), 0)::float8 AS lag_seconds
FROM sidetrend.series s
JOIN sidetrend.trackers t ON t.id = s.tracker_id;

COMMENT ON TABLE sidetrend.trackers IS 'One row per tracked source table and model; created by sidetrend.track().';
COMMENT ON TABLE sidetrend.changes IS 'Durable change log: capture triggers append per-statement bucket aggregates; the sidecar drains it.';
COMMENT ON TABLE sidetrend.points IS 'Bucket aggregates per series: n, sum, min, max and last of the source rows in each bucket.';
COMMENT ON TABLE sidetrend.series IS 'One row per series: estimator state and the current forecast arrays.';
COMMENT ON TABLE sidetrend.rejects IS 'Source rows that were not folded in (NULL, NaN, infinite or out-of-range time or value), with the reason.';
COMMENT ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int)
    IS 'Register a tracker on a table: time column, value column, key columns, bucket width, aggregate, model and horizon. Returns the tracker id.';
COMMENT ON FUNCTION sidetrend.untrack(text) IS 'Remove a tracker, its triggers, series and pending changes. The source table is not touched.';
COMMENT ON VIEW sidetrend.forecasts IS 'Forecasts per series and horizon 1..H with 80 and 95 percent intervals and cumulative sums; estimates under model assumptions.';
COMMENT ON VIEW sidetrend.slopes IS 'Local trend level and slope per series (value units per bucket); direction up/down when |slope_t| >= 2, else flat.';
COMMENT ON VIEW sidetrend.series_status IS 'Per series: folded points, newest folded bucket, warming or ready, seconds the oldest pending change has waited.';

COMMENT ON FUNCTION sidetrend.install_capture(int) IS 'Internal: (re)create the capture, truncate, backfill and recompute functions and the triggers of one tracker from its row in sidetrend.trackers.';
COMMENT ON FUNCTION sidetrend.series_key_expr(text[], text) IS 'Internal: the SQL expression that joins a row''s key columns into its series_key (values as text, joined with |).';
COMMENT ON FUNCTION sidetrend.rebuild(text, text) IS 'Queue a rebuild from the source table itself (for changes made with triggers disabled): the whole tracker, or one series.';
COMMENT ON FUNCTION sidetrend.recompute_dirty(int) IS 'Internal: recompute from the source the buckets of a min, max or last tracker that a delete or update touched.';
COMMENT ON TABLE sidetrend.resync IS 'Series queued by sidetrend.rebuild(name, series_key) to be read again from the source table.';

-- +goose Down
DROP FUNCTION IF EXISTS sidetrend.recompute_dirty(int);
DROP FUNCTION IF EXISTS sidetrend.rebuild(text, text);
DROP TABLE IF EXISTS sidetrend.resync;
DROP VIEW IF EXISTS sidetrend.series_status;
DROP VIEW IF EXISTS sidetrend.slopes;
DROP VIEW IF EXISTS sidetrend.forecasts;
DROP FUNCTION IF EXISTS sidetrend.untrack(text);
DROP FUNCTION IF EXISTS sidetrend.install_capture(int);
DROP FUNCTION IF EXISTS sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int);
DROP FUNCTION IF EXISTS sidetrend.series_key_expr(text[], text);
DROP TABLE IF EXISTS sidetrend.rejects;
DROP TABLE IF EXISTS sidetrend.series;
DROP TABLE IF EXISTS sidetrend.points;
DROP TABLE IF EXISTS sidetrend.changes;
DROP TABLE IF EXISTS sidetrend.trackers;
