-- Security: nothing a user supplies becomes code, nothing a table owner
-- controls runs with sidetrend's rights, nothing a writer of source rows does
-- stops the log, and every tracker has an owner.
--
-- What changes (README, "Security", says it for users):
--
-- * install_capture builds each generated function's body as text and hands
--   it to CREATE FUNCTION as a quoted literal (format %L), never inside a
--   dollar quote: before, a column named "k$body$;SELECT w.pwn();SELECT
--   $body$" closed the $body$ wrapper and ran w.pwn() as sidetrend. Inside a
--   body, identifiers are %I and literals %L as before.
-- * Tracked columns must have built-in types (time: timestamptz, timestamp,
--   date; value: smallint, integer, bigint, real, double precision, numeric;
--   keys: text, varchar, char, smallint, integer, bigint, uuid, boolean), so
--   the casts and operators the generated code uses are Postgres' own. Each
--   capture statement first checks that the tracked columns still have the
--   names and types install_capture saw (one catalogue probe); if the owner
--   changed them, the statement captures nothing and asks the sidecar for a
--   rebuild, which checks the table again before it reads it.
-- * The backfill and the one-bucket recompute run with row_security = off: a
--   table whose policies would apply makes them fail (the tracker pauses)
--   instead of running the owner's policy functions. track() refuses tables
--   with row-level security.
-- * The backfill takes no SHARE lock on the source any more (writers were
--   blocked for the whole scan): it holds a per-tracker advisory lock, which
--   keeps drains off the tracker's changes, and in ONE statement deletes the
--   changes its snapshot sees and reads the table under that same snapshot.
--   A change committed later stays in the log and is folded on top. The
--   sidecar's role needs SELECT and TRIGGER on a tracked table, no UPDATE.
-- * Rows the sidecar cannot store go to rejects at capture time: series keys
--   over 1000 bytes, and times more than the tracker's span from now (span
--   defaults to 100,000 buckets, at most 1000 years; track(span => ...)
--   takes up to 10000 years, the whole calendar). Rejects keep the
--   tracked columns only, and the sidecar prunes them (prune_rejects).
-- * Capture notifies only while no sidecar holds the lease in
--   sidetrend.wake (see install_capture and pgsync's Runner).
-- * Every tracker records its owner, the role that called track(). track,
--   untrack, rebuild, tune and request_tune are SECURITY INVOKER wrappers that
--   pass current_user to SECURITY DEFINER functions (_track_as and so on),
--   which accept it only if the session's login role may act as it. Only
--   the owner, a member of sidetrend_admin or the sidecar's role may untrack,
--   tune or rebuild a tracker; all checks use that role, so SET ROLE to a
--   role without SELECT no longer tracks a table.
-- * check_trackers (run by the sidecar) pauses a tracker whose source, owner
--   or columns no longer pass the checks above (its capture triggers are
--   dropped and its pending changes discarded) and resumes it with a full
--   backfill when they pass again. mark_broken sets aside a tracker whose
--   changes failed to drain, the same way; rebuild(name) resumes it.
-- * Readers see only trackers whose source table they may SELECT: every
--   view filters with sidetrend.may_read, and sidetrend.surprises has a
--   row-level security policy. The surprise NOTIFY carries ids only (pgsync).

-- +goose Up
ALTER TABLE sidetrend.trackers
    ADD COLUMN IF NOT EXISTS owner name,
    ADD COLUMN IF NOT EXISTS span interval,
    ADD COLUMN IF NOT EXISTS col_types int[],
    ADD COLUMN IF NOT EXISTS status_at timestamptz;
-- Trackers made before owners existed belong to the sidecar's role; its
-- administrator can hand them over (README, Upgrading).
UPDATE sidetrend.trackers SET owner = current_user, span = least(bucket * 100000, interval '1000 years') WHERE owner IS NULL;
ALTER TABLE sidetrend.trackers
    ALTER COLUMN owner SET NOT NULL,
    ALTER COLUMN span SET NOT NULL,
    DROP CONSTRAINT IF EXISTS trackers_status_check,
    ADD CONSTRAINT trackers_status_check CHECK (status IN ('active', 'paused', 'broken'));
COMMENT ON COLUMN sidetrend.trackers.owner IS 'The role that created the tracker: it (or a member of it or of sidetrend_admin) may untrack, tune and rebuild it.';
COMMENT ON COLUMN sidetrend.trackers.span IS 'Rows whose time is further than this from now (before or after) are rejected at capture: it bounds the empty buckets one row can make.';
COMMENT ON COLUMN sidetrend.trackers.col_types IS 'Type oids of the tracked columns, ordered by column name, as install_capture checked them; capture compares them on every statement.';
COMMENT ON COLUMN sidetrend.trackers.status_at IS 'When status last changed to paused or broken (last_error says why).';

DROP TRIGGER IF EXISTS _sidetrend_access ON sidetrend.trackers;
DROP FUNCTION IF EXISTS sidetrend.check_tracker_access();

-- source_problem says what keeps sidetrend from reading a table safely, or
-- returns NULL code when nothing does. The checks run as the calling role
-- (the sidecar's, inside the SECURITY DEFINER callers). owner, when given,
-- must still exist and may read the table.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.source_problem(source oid, time_col text, value_col text, key_cols text[], owner name,
    OUT code text, OUT message text, OUT hint text)
LANGUAGE plpgsql STABLE SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    v_kind  "char";
    v_rls   boolean;
    v_rel   text;
    v_cols  text;
    v_type  regtype;
    c       text;
BEGIN
    SELECT cl.relkind, cl.relrowsecurity, format('%I.%I', n.nspname, cl.relname) INTO v_kind, v_rls, v_rel
    FROM pg_class cl JOIN pg_namespace n ON n.oid = cl.relnamespace WHERE cl.oid = source_problem.source;
    IF v_rel IS NULL THEN
        code := '42P01'; message := format('source table (oid %s) no longer exists', source_problem.source);
        hint := 'Untrack the tracker, or track the new table.';
        RETURN;
    END IF;
    IF v_kind = 'v' OR v_kind = 'm' THEN
        code := '42809'; message := format('cannot track %s: it is a view', v_rel);
        hint := 'Track the table the view reads from; triggers on a view do not see writes to its tables.';
        RETURN;
    ELSIF v_kind NOT IN ('r', 'p') THEN
        code := '42809'; message := format('cannot track %s: it is not a table', v_rel);
        hint := 'Only tables and partitioned tables can be tracked.';
        RETURN;
    END IF;
    IF v_rls THEN
        code := '42501'; message := format('%s has row-level security enabled: sidetrend does not read tables whose policies would run with its rights', v_rel);
        hint := format('Disable it (ALTER TABLE %s DISABLE ROW LEVEL SECURITY) or track a table without policies, such as one the policy-protected table is filled from.', v_rel);
        RETURN;
    END IF;
    SELECT string_agg(quote_ident(a.attname), ', ' ORDER BY a.attnum) INTO v_cols
    FROM pg_attribute a WHERE a.attrelid = source_problem.source AND a.attnum > 0 AND NOT a.attisdropped;

    IF time_col IS NULL OR time_col = '' THEN
        code := '22023'; message := 'time_col is missing'; hint := format('Pass time_col => one of: %s.', v_cols);
        RETURN;
    END IF;
    SELECT a.atttypid::regtype INTO v_type FROM pg_attribute a
    WHERE a.attrelid = source_problem.source AND a.attname = time_col AND a.attnum > 0 AND NOT a.attisdropped;
    IF v_type IS NULL THEN
        code := '42703'; message := format('column "%s" does not exist in %s', time_col, v_rel);
        hint := format('Pass time_col => one of: %s.', v_cols);
        RETURN;
    END IF;
    IF v_type NOT IN ('timestamp with time zone'::regtype, 'timestamp without time zone'::regtype, 'date'::regtype) THEN
        code := '42804'; message := format('time column "%s" of %s has type %s, not date, timestamp or timestamptz', time_col, v_rel, v_type);
        hint := 'Pass a date or timestamp column as time_col, or add a generated column that casts it.';
        RETURN;
    END IF;

    IF value_col IS NULL THEN
        code := '22023'; message := 'value_col is missing'; hint := format('Pass value_col => one of: %s (or agg => ''count'', which needs none).', v_cols);
        RETURN;
    END IF;
    v_type := NULL;
    SELECT a.atttypid::regtype INTO v_type FROM pg_attribute a
    WHERE a.attrelid = source_problem.source AND a.attname = value_col AND a.attnum > 0 AND NOT a.attisdropped;
    IF v_type IS NULL AND value_col <> '' THEN
        code := '42703'; message := format('column "%s" does not exist in %s', value_col, v_rel);
        hint := format('Pass value_col => one of: %s.', v_cols);
        RETURN;
    END IF;
    -- value_col '' is a count tracker's: no value column.
    IF value_col <> '' AND v_type NOT IN ('smallint'::regtype, 'integer'::regtype, 'bigint'::regtype, 'real'::regtype,
                      'double precision'::regtype, 'numeric'::regtype) THEN
        code := '42804'; message := format('value column "%s" of %s has type %s, which is not numeric', value_col, v_rel, v_type);
        hint := 'Pass a smallint, integer, bigint, real, double precision or numeric column as value_col (domains and types of your own are not read: their casts would run with sidetrend''s rights).';
        RETURN;
    END IF;

    FOREACH c IN ARRAY coalesce(key_cols, '{}') LOOP
        v_type := NULL;
        SELECT a.atttypid::regtype INTO v_type FROM pg_attribute a
        WHERE a.attrelid = source_problem.source AND a.attname = c AND a.attnum > 0 AND NOT a.attisdropped;
        IF v_type IS NULL THEN
            code := '42703'; message := format('key column "%s" does not exist in %s', c, v_rel);
            hint := format('Pass key_cols => columns among: %s.', v_cols);
            RETURN;
        END IF;
        IF v_type NOT IN ('text'::regtype, 'character varying'::regtype, 'character'::regtype, 'smallint'::regtype,
                          'integer'::regtype, 'bigint'::regtype, 'uuid'::regtype, 'boolean'::regtype) THEN
            code := '42804'; message := format('key column "%s" of %s has type %s, which sidetrend does not read', c, v_rel, v_type);
            hint := 'Key columns must be text, varchar, char, smallint, integer, bigint, uuid or boolean (domains and types of your own are not read: their casts would run with sidetrend''s rights); add a generated column that converts the key.';
            RETURN;
        END IF;
    END LOOP;

    IF NOT has_schema_privilege(current_user, (SELECT cl.relnamespace FROM pg_class cl WHERE cl.oid = source_problem.source), 'USAGE') THEN
        code := '42501'; message := format('sidetrend''s role "%s" may not use the schema of %s', current_user, v_rel);
        hint := format('As the schema''s owner, run GRANT USAGE ON SCHEMA %I TO %I.',
                       (SELECT n.nspname FROM pg_class cl JOIN pg_namespace n ON n.oid = cl.relnamespace WHERE cl.oid = source_problem.source), current_user);
        RETURN;
    END IF;
    IF NOT has_table_privilege(current_user, source_problem.source, 'SELECT')
       OR NOT has_table_privilege(current_user, source_problem.source, 'TRIGGER') THEN
        code := '42501'; message := format('sidetrend''s role "%s" may not read %s or create triggers on it', current_user, v_rel);
        hint := format('As the table''s owner, run GRANT SELECT, TRIGGER ON %s TO %I.', v_rel, current_user);
        RETURN;
    END IF;
    IF owner IS NOT NULL THEN
        IF NOT EXISTS (SELECT 1 FROM pg_roles r WHERE r.rolname = owner) THEN
            code := '42704'; message := format('the tracker''s owner, role "%s", no longer exists', owner);
            hint := 'A member of sidetrend_admin can untrack it, or give it a new owner: UPDATE sidetrend.trackers SET owner = ... as the sidecar''s role.';
            RETURN;
        END IF;
        IF NOT has_table_privilege(owner, source_problem.source, 'SELECT') THEN
            code := '42501'; message := format('the tracker''s owner, role "%s", may no longer read %s', owner, v_rel);
            hint := format('Forecasts come from the rows: they stop while their owner may not read them. GRANT SELECT ON %s TO %I resumes it.', v_rel, owner);
            RETURN;
        END IF;
    END IF;
END
$fn$;
-- +goose StatementEnd

-- The type oids of the named columns, ordered by column name: what each
-- capture statement compares (the same query, on TG_RELID).
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.column_signature(source oid, cols text[]) RETURNS int[]
LANGUAGE sql STABLE SET search_path = pg_catalog, pg_temp
RETURN (SELECT array_agg(a.atttypid::int ORDER BY a.attname) FROM pg_catalog.pg_attribute a
        WHERE a.attrelid = source AND a.attname = ANY (cols::name[]) AND NOT a.attisdropped);
-- +goose StatementEnd

-- The sidecar's lease: while a sidecar is awake it keeps awake_until a
-- little in the future and reads the change log by itself, and capture
-- statements skip pg_notify (see install_capture). NOTIFY wakes a sleeping
-- sidecar. One row.
CREATE TABLE IF NOT EXISTS sidetrend.wake (
    id          int PRIMARY KEY DEFAULT 1 CHECK (id = 1),
    awake_until timestamptz NOT NULL DEFAULT '-infinity'
);
INSERT INTO sidetrend.wake DEFAULT VALUES ON CONFLICT DO NOTHING;
COMMENT ON TABLE sidetrend.wake IS 'One row: until awake_until a sidecar reads the change log by itself and capture triggers do not notify (a notifying commit takes a cluster-wide lock).';

-- columns_changed is what a capture statement does when the tracked columns
-- no longer have the names and types its code was made for: the tracker
-- waits for a backfill (the sidecar checks the table again first, and
-- pauses the tracker if it may not read it), and the sidecar is woken. It
-- returns true.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.columns_changed(tracker_id int) RETURNS boolean
LANGUAGE plpgsql SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    UPDATE sidetrend.trackers t SET backfilled = false WHERE t.id = columns_changed.tracker_id AND t.backfilled;
    PERFORM pg_notify('sidetrend', columns_changed.tracker_id::text);
    RETURN true;
END
$fn$;
-- +goose StatementEnd

-- install_capture (re)creates the capture, backfill, recompute and truncate
-- functions of one tracker and its triggers. It raises source_problem's
-- error when the table may not be read safely. Every function body is
-- built as text and passed to CREATE FUNCTION as one quoted literal (%L):
-- no name, however it is spelt, can end the body early. Inside the bodies
-- identifiers are quoted with %I and literals with %L.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.install_capture(tracker_id int) RETURNS void
LANGUAGE plpgsql SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t        sidetrend.trackers;
    p        record;
    v_vtype  regtype;
    v_t      text;
    v_v      text;
    v_tstz   text;
    v_ttype  text;
    v_lo     text;
    v_hi     text;
    v_lo_in  text;
    v_hi_in  text;
    v_extra   text;
    v_valid  text;
    v_valid_in text;
    v_reason text;
    v_json   text;
    v_sel    text;
    v_last   text;
    v_key    text;
    v_range  text;
    v_cols   text[];
    v_sig    int[];
    v_body   text;
    v_typed  text;
    v_cap    text := format('sidetrend.%I', '_capture_' || install_capture.tracker_id);
    v_back   text := format('sidetrend.%I', '_backfill_' || install_capture.tracker_id);
    v_trg    text := '_sidetrend_' || install_capture.tracker_id;
    v_rec    text := format('sidetrend.%I', '_recompute_' || install_capture.tracker_id);
    v_trunc  text := format('sidetrend.%I', '_truncate_' || install_capture.tracker_id);
    v_rel    text;
BEGIN
    SELECT * INTO STRICT t FROM sidetrend.trackers WHERE id = install_capture.tracker_id;
    p := sidetrend.source_problem(t.source, t.time_col, t.value_col, t.key_cols, t.owner);
    IF p.code IS NOT NULL THEN
        RAISE EXCEPTION '%', p.message USING ERRCODE = p.code, HINT = p.hint;
    END IF;
    -- The schema-qualified name as of now (the table may have been renamed).
    SELECT format('%I.%I', n.nspname, c.relname) INTO STRICT v_rel
    FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace WHERE c.oid = t.source;
    v_cols := ARRAY[t.time_col, t.value_col] || t.key_cols;
    v_sig := sidetrend.column_signature(t.source, v_cols);
    v_ttype := (SELECT a.atttypid::regtype::text FROM pg_attribute a
                WHERE a.attrelid = t.source AND a.attname = t.time_col AND NOT a.attisdropped);
    UPDATE sidetrend.trackers SET source_name = v_rel, col_types = v_sig,
        time_type = CASE v_ttype WHEN 'timestamp with time zone' THEN 'timestamptz'
                                 WHEN 'timestamp without time zone' THEN 'timestamp' ELSE 'date' END
    WHERE id = t.id
    RETURNING * INTO t;
    SELECT a.atttypid::regtype INTO v_vtype FROM pg_attribute a
    WHERE a.attrelid = t.source AND a.attname = t.value_col AND NOT a.attisdropped;

    v_t := format('r.%I', t.time_col);
    -- A count tracker without a value column (value_col ''): every row
    -- counts 1.
    v_v := CASE WHEN t.value_col = '' THEN '1' ELSE format('r.%I', t.value_col) END;
    v_tstz := CASE t.time_type
        WHEN 'timestamptz' THEN v_t
        WHEN 'timestamp' THEN format('(%s AT TIME ZONE %L)', v_t, t.tz)
        ELSE format('(%s::timestamp AT TIME ZONE %L)', v_t, t.tz) END;
    -- The span's bounds in the column's own type: as plpgsql variables
    -- (computed once per statement) and inline (for the SQL recompute).
    -- now() +- span, clamped to the years 1 to 9999 that the calendar
    -- covers (a span of up to 10000 years means: the whole calendar).
    v_lo_in := CASE t.time_type
        WHEN 'timestamptz' THEN format('(CASE WHEN %1$L::interval >= now() - %2$L::timestamptz THEN %2$L::timestamptz ELSE now() - %1$L::interval END)',
                                       t.span, '0001-01-01 00:00:00+00')
        WHEN 'timestamp' THEN format('(CASE WHEN %1$L::interval >= now() - %2$L::timestamptz THEN %3$L::timestamp ELSE (now() - %1$L::interval) AT TIME ZONE %4$L END)',
                                     t.span, '0001-01-02 00:00:00+00', '0001-01-01', t.tz)
        ELSE format('(CASE WHEN %1$L::interval >= now() - %2$L::timestamptz THEN %3$L::date ELSE ((now() - %1$L::interval) AT TIME ZONE %4$L)::date END)',
                    t.span, '0001-01-02 00:00:00+00', '0001-01-01', t.tz) END;
    v_hi_in := CASE t.time_type
        WHEN 'timestamptz' THEN format('(CASE WHEN %1$L::interval >= %2$L::timestamptz - now() THEN %2$L::timestamptz ELSE now() + %1$L::interval END)',
                                       t.span, '9999-12-31 23:59:59.999999+00')
        WHEN 'timestamp' THEN format('(CASE WHEN %1$L::interval >= %2$L::timestamptz - now() THEN %3$L::timestamp ELSE (now() + %1$L::interval) AT TIME ZONE %4$L END)',
                                     t.span, '9999-12-30 23:59:59.999999+00', '9999-12-31 23:59:59.999999', t.tz)
        ELSE format('(CASE WHEN %1$L::interval >= %2$L::timestamptz - now() THEN %3$L::date ELSE ((now() + %1$L::interval) AT TIME ZONE %4$L)::date END)',
                    t.span, '9999-12-30 23:59:59.999999+00', '9999-12-31', t.tz) END;
    -- The bytes of the text-like key columns and their separators: a key
    -- longer than 1000 bytes is rejected (index entries hold at most about
    -- 2700 bytes; a longer key stopped the whole log before).
    SELECT string_agg(format('coalesce(octet_length(r.%I), 0)', a.attname), ' + ')
           || format(' + %s', greatest(cardinality(t.key_cols) - 1, 0))
    INTO v_extra
    FROM unnest(t.key_cols) AS k(c)
    JOIN pg_attribute a ON a.attrelid = t.source AND a.attname = k.c AND NOT a.attisdropped
    WHERE a.atttypid IN ('text'::regtype, 'character varying'::regtype, 'character'::regtype);
    -- A row is folded in when its time is within the span and its value is
    -- a finite number within +-1e150, so that its square (which the
    -- estimator forms) cannot overflow a float8; numeric values are
    -- compared before the cast, so that a huge numeric cannot make the cast
    -- fail.
    -- The same condition twice: with the span's bounds as variables and
    -- inline (one format each, so no name is read as a format string).
    v_extra := CASE WHEN v_extra IS NULL THEN '' ELSE format(' AND %s <= 1000', v_extra) END;
    -- On the log scale (trackers.transform, migration 00012; read through
    -- to_jsonb so that this function also runs before that column exists)
    -- a value that is not positive has no logarithm: it is a reject.
    IF (to_jsonb(t) ->> 'transform') = 'log' THEN
        v_extra := v_extra || format(' AND %s > 0', v_v);
    END IF;
    v_valid := format('%1$s IS NOT NULL AND %1$s >= %4$s AND %1$s <= %5$s AND %2$s IS NOT NULL AND %2$s %3$s%6$s',
        v_t, v_v,
        CASE WHEN v_vtype = 'numeric'::regtype THEN 'BETWEEN -1e150 AND 1e150'
             ELSE 'BETWEEN -1e150::float8 AND 1e150::float8' END,
        'v_lo', 'v_hi', v_extra);
    v_valid_in := format('%1$s IS NOT NULL AND %1$s >= %4$s AND %1$s <= %5$s AND %2$s IS NOT NULL AND %2$s %3$s%6$s',
        v_t, v_v,
        CASE WHEN v_vtype = 'numeric'::regtype THEN 'BETWEEN -1e150 AND 1e150'
             ELSE 'BETWEEN -1e150::float8 AND 1e150::float8' END,
        v_lo_in, v_hi_in, v_extra);
    v_reason := format($r$CASE WHEN %1$s IS NULL THEN 'time is NULL'
        WHEN NOT isfinite(%1$s) THEN 'time is infinite'
        WHEN NOT (%1$s >= %4$s AND %1$s < %5$s) THEN 'time is outside the years 1 to 9999'
        WHEN %1$s < v_lo OR %1$s > v_hi THEN %3$L
        WHEN %2$s IS NULL THEN 'value is NULL'
        WHEN %2$s::text = 'NaN' THEN 'value is NaN'
        WHEN %2$s::text IN ('Infinity', '-Infinity') THEN 'value is infinite'
        WHEN NOT (%2$s BETWEEN -1e150 AND 1e150) THEN 'value is beyond +-1e150 (too large to fold in without overflow)'
        WHEN NOT (%2$s > 0) AND %6$L THEN 'value is not positive (the tracker fits logarithms)'
        ELSE 'series key is longer than 1000 bytes' END$r$, v_t, v_v,
        format('time is more than %s from now (the tracker''s span)', t.span),
        CASE t.time_type WHEN 'timestamptz' THEN '''0001-01-01 00:00:00+00''::timestamptz'
             WHEN 'timestamp' THEN '''0001-01-01''::timestamp' ELSE '''0001-01-01''::date' END,
        CASE t.time_type WHEN 'timestamptz' THEN '''10000-01-01 00:00:00+00''::timestamptz'
             WHEN 'timestamp' THEN '''10000-01-01''::timestamp' ELSE '''10000-01-01''::date' END,
        coalesce((to_jsonb(t) ->> 'transform') = 'log', false));
    v_key := sidetrend.series_key_expr(t.key_cols, 'r');
    -- Rejects keep the tracked columns only, as text, the key cut at 200
    -- characters.
    v_json := format('jsonb_build_object(%L, %s::text, %L, %s::text, %L, left(%s, 200))',
        'time', v_t, 'value', v_v, 'key', v_key);
    v_range := CASE t.time_type
        WHEN 'timestamptz' THEN format('%1$s >= sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AND %1$s < sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L)', v_t, t.bucket, t.tz)
        WHEN 'timestamp' THEN format('%1$s >= (sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AT TIME ZONE %3$L) AND %1$s < (sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L) AT TIME ZONE %3$L)', v_t, t.bucket, t.tz)
        ELSE format('%1$s >= (sidetrend.bucket_start(only_bucket, %2$L::interval, %3$L) AT TIME ZONE %3$L)::date AND %1$s <= (sidetrend.bucket_start(only_bucket + 1, %2$L::interval, %3$L) AT TIME ZONE %3$L)::date', v_t, t.bucket, t.tz) END;
    v_last := CASE WHEN t.agg = 'last'
        THEN format('max(%1$s) AS lt, (array_agg(%2$s::float8 ORDER BY %1$s DESC, %2$s DESC))[1] AS lv', v_tstz, v_v)
        ELSE 'NULL::timestamptz AS lt, NULL::float8 AS lv' END;
    -- A numeric value is summed exactly and converted once per group: its
    -- conversion to float8 goes through text, and per row it was the
    -- largest single cost of capturing a COPY (the sum is then the float8
    -- nearest the exact sum, where a sum of converted values could be a
    -- few units in the last place off it).
    v_sel := format('SELECT %s AS k, sidetrend.bucket_index(%s, %L::interval, %L) AS b, count(*) AS n, '
                    '%s AS s, %s, %s',
        v_key, v_t, t.bucket, t.tz,
        CASE WHEN v_vtype = 'numeric'::regtype THEN format('sum(%s)::float8', v_v) ELSE format('sum(%s::float8)', v_v) END,
        CASE WHEN t.agg IN ('min', 'max') THEN format('min(%1$s::float8) AS mn, max(%1$s::float8) AS mx', v_v)
             ELSE 'NULL::float8 AS mn, NULL::float8 AS mx' END,
        v_last);
    v_lo := format('v_lo %s := %s;', t.time_type, v_lo_in);
    v_hi := format('v_hi %s := %s;', t.time_type, v_hi_in);

    -- Capture. Code of the table owner's must never run here (see the
    -- header), so the tracked columns must have the types install_capture
    -- checked. An INSERT, the common statement, checks them per row with
    -- pg_typeof, which reads a value's type and calls nothing, inside a CASE
    -- (which Postgres evaluates in order) before any cast, operator or
    -- function touches the values; only when a row is not taken in does it
    -- read the catalogue, to tell a reject from a changed column. The same
    -- statement reads the lease, and a single row is not grouped: a
    -- single-row INSERT's trigger went from about 140-250 us to 50-70 us of
    -- CPU in a loop of 10,000 statements, measured from /proc.
    -- UPDATE and DELETE read the catalogue first. The INSERT and DELETE
    -- branches filter with an opaque condition, which keeps the planner's
    -- row estimate high enough to hash the groups (migration 00005).
    v_typed := (SELECT string_agg(format('pg_typeof(r.%I) = %s::oid::regtype', a.attname, a.atttypid), ' AND ' ORDER BY a.attname)
                FROM pg_attribute a
                WHERE a.attrelid = t.source AND a.attname = ANY (v_cols::name[]) AND NOT a.attisdropped);
    v_body := format($tpl$
DECLARE
    v_folded bigint;
    v_rows   bigint;
    v_notify boolean;
    %7$s
    %8$s
BEGIN
    IF TG_OP = 'INSERT' THEN
        v_rows := (SELECT count(*) FROM new_rows);
        IF v_rows = 1 THEN
            -- One row (an application writing row by row): no grouping,
            -- whose hash table cost a sixth of the trigger's time.
            WITH ins AS (
                INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
                SELECT %1$s, g.* FROM (%13$s FROM new_rows r WHERE CASE WHEN %11$s THEN coalesce(%3$s, false) ELSE false END) g
                RETURNING n)
            SELECT coalesce(sum(n), 0), coalesce((SELECT w.awake_until FROM sidetrend.wake w), '-infinity') <= clock_timestamp()
            INTO v_folded, v_notify FROM ins;
        ELSE
            WITH ins AS (
                INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
                SELECT %1$s, g.* FROM (%2$s FROM new_rows r WHERE CASE WHEN %11$s THEN coalesce(%3$s, false) ELSE false END GROUP BY 1, 2) g
                RETURNING n)
            SELECT coalesce(sum(n), 0), coalesce((SELECT w.awake_until FROM sidetrend.wake w), '-infinity') <= clock_timestamp()
            INTO v_folded, v_notify FROM ins;
        END IF;
        IF v_folded < v_rows THEN
            IF (%12$s) THEN
                RETURN NULL;
            END IF;
            INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
            SELECT %1$s, %4$s, %5$s FROM new_rows r WHERE NOT CASE WHEN %11$s THEN coalesce(%3$s, false) ELSE false END;
        END IF;
    ELSE
        IF (%12$s) THEN
            RETURN NULL;
        END IF;
        IF TG_OP = 'DELETE' THEN
            INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, retract)
            SELECT %1$s, g.k, g.b, -g.n, -g.s, g.mn, g.mx, NULL, NULL, true
            FROM (%2$s FROM old_rows r WHERE coalesce(%3$s, false) GROUP BY 1, 2) g;
        ELSE
            -- An UPDATE moves each row's contribution from its old series
            -- and bucket to its new one. Groups whose aggregates did not
            -- change (an update of another column) write nothing.
            INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
            SELECT %1$s, %4$s, %5$s FROM new_rows r WHERE NOT coalesce(%3$s, false);
            WITH o AS (%2$s FROM old_rows r WHERE %3$s GROUP BY 1, 2),
                 nw AS (%2$s FROM new_rows r WHERE %3$s GROUP BY 1, 2)
            INSERT INTO sidetrend.changes (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, retract)
            SELECT %1$s, o.k, o.b, -o.n, -o.s, o.mn, o.mx, NULL, NULL, true FROM o
            WHERE NOT EXISTS (SELECT 1 FROM nw WHERE (nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv)
                              IS NOT DISTINCT FROM (o.k, o.b, o.n, o.s, o.mn, o.mx, o.lt, o.lv))
            UNION ALL
            SELECT %1$s, nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv, false FROM nw
            WHERE NOT EXISTS (SELECT 1 FROM o WHERE (nw.k, nw.b, nw.n, nw.s, nw.mn, nw.mx, nw.lt, nw.lv)
                              IS NOT DISTINCT FROM (o.k, o.b, o.n, o.s, o.mn, o.mx, o.lt, o.lv));
        END IF;
        v_notify := coalesce((SELECT w.awake_until FROM sidetrend.wake w), '-infinity') <= clock_timestamp();
    END IF;
    -- Wake the sidecar only while it sleeps. While it is awake it holds a
    -- lease (sidetrend.wake) and reads the log by itself; a commit that
    -- notifies takes a cluster-wide lock until it is flushed, which capped
    -- notifying commits at 2-3k/s. clock_timestamp(), not the statement's
    -- start: the sidecar waits for the transactions in progress when its
    -- lease ran out (pgsync, Runner), which are the ones that can have
    -- seen it.
    IF v_notify THEN
        PERFORM pg_notify('sidetrend', %6$L);
    END IF;
    RETURN NULL;
END
$tpl$, t.id, v_sel, v_valid, v_reason, v_json, t.id::text, v_lo, v_hi, v_cols, v_sig, v_typed,
    -- %12$s: the tracked columns changed (names or types): capture nothing
    -- with these rights, and ask the sidecar to check the table again and
    -- rebuild.
    format($chk$CASE WHEN (SELECT array_agg(a.atttypid::int ORDER BY a.attname) FROM pg_catalog.pg_attribute a
        WHERE a.attrelid = TG_RELID AND a.attname = ANY (%1$L::name[]) AND NOT a.attisdropped)
       IS DISTINCT FROM %2$L::int[] THEN sidetrend.columns_changed(%3$s) ELSE false END$chk$, v_cols, v_sig, t.id),
    -- %13$s: the SELECT list of one row, as v_sel's of a group of one.
    format('SELECT %s AS k, sidetrend.bucket_index(%s, %L::interval, %L) AS b, 1::bigint AS n, %s::float8 AS s, %s, %s',
        v_key, v_t, t.bucket, t.tz, v_v,
        CASE WHEN t.agg IN ('min', 'max') THEN format('%1$s::float8 AS mn, %1$s::float8 AS mx', v_v)
             ELSE 'NULL::float8 AS mn, NULL::float8 AS mx' END,
        CASE WHEN t.agg = 'last' THEN format('%s AS lt, %s::float8 AS lv', v_tstz, v_v)
             ELSE 'NULL::timestamptz AS lt, NULL::float8 AS lv' END));
    EXECUTE format('CREATE OR REPLACE FUNCTION %s() RETURNS trigger LANGUAGE plpgsql SECURITY DEFINER '
                   'SET search_path = pg_catalog, pg_temp AS %L', v_cap, v_body);

    -- Backfill: take in the table's current rows, for the whole tracker or
    -- for one series, without blocking its writers. The advisory lock
    -- (class 21332, object the tracker id) keeps drains off this tracker's
    -- changes (claimSQL in pgsync skips them) and waits for drains that
    -- hold some; then one statement deletes the changes its snapshot sees
    -- and reads the table under that same snapshot, so a row is counted
    -- once: by the scan if its transaction committed before the snapshot,
    -- by a later drain otherwise. row_security = off makes a table with
    -- applicable policies fail instead of running them.
    v_body := format($tpl$
DECLARE
    %6$s
    %7$s
BEGIN
    PERFORM pg_advisory_xact_lock(21332, %2$s);
    DELETE FROM sidetrend.points WHERE tracker_id = %2$s AND (only_key IS NULL OR series_key = only_key);
    IF only_key IS NULL THEN
        DELETE FROM sidetrend.rejects WHERE tracker_id = %2$s;
        WITH gone AS (DELETE FROM sidetrend.changes WHERE tracker_id = %2$s),
             rej AS (INSERT INTO sidetrend.rejects (tracker_id, reason, row_data)
                     SELECT %2$s, %8$s, %9$s FROM %1$s r WHERE NOT coalesce(%4$s, false))
        INSERT INTO sidetrend.points (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
        SELECT %2$s, g.* FROM (%3$s FROM %1$s r WHERE coalesce(%4$s, false) GROUP BY 1, 2) g;
    ELSE
        WITH gone AS (DELETE FROM sidetrend.changes WHERE tracker_id = %2$s AND series_key = only_key)
        INSERT INTO sidetrend.points (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v)
        SELECT %2$s, g.* FROM (%3$s FROM %1$s r WHERE coalesce(%4$s, false) AND %5$s = only_key GROUP BY 1, 2) g;
    END IF;
    UPDATE sidetrend.series SET rebuild = true WHERE tracker_id = %2$s AND (only_key IS NULL OR series_key = only_key);
    INSERT INTO sidetrend.series (tracker_id, series_key, rebuild)
    SELECT DISTINCT %2$s, p.series_key, true FROM sidetrend.points p
    WHERE p.tracker_id = %2$s AND (only_key IS NULL OR p.series_key = only_key)
    ON CONFLICT ON CONSTRAINT series_pkey DO NOTHING;
    IF only_key IS NULL THEN
        UPDATE sidetrend.trackers SET backfilled = true WHERE id = %2$s;
    END IF;
END
$tpl$, v_rel, t.id, v_sel, v_valid, v_key, v_lo, v_hi, v_reason, v_json);
    EXECUTE format('CREATE OR REPLACE FUNCTION %s(only_key text DEFAULT NULL) RETURNS void LANGUAGE plpgsql '
                   'SECURITY DEFINER SET search_path = pg_catalog, pg_temp SET row_security = off AS %L', v_back, v_body);

    -- Recompute one bucket from the source: for min, max and last, whose
    -- value a delete cannot subtract.
    v_body := format($tpl$
    SELECT g.n, g.s, g.mn, g.mx, g.lt, g.lv
    FROM (%1$s FROM %2$s r WHERE %3$s AND %4$s AND %5$s = only_key GROUP BY 1, 2) g
    WHERE g.b = only_bucket
$tpl$, v_sel, v_rel, v_valid_in, v_range, v_key);
    EXECUTE format('CREATE OR REPLACE FUNCTION %s(only_key text, only_bucket bigint) '
                   'RETURNS TABLE (n bigint, s float8, mn float8, mx float8, lt timestamptz, lv float8) '
                   'LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, pg_temp SET row_security = off AS %L',
                   v_rec, v_body);

    -- TRUNCATE empties the table: its series start over.
    v_body := format($tpl$
BEGIN
    DELETE FROM sidetrend.changes WHERE tracker_id = %1$s;
    DELETE FROM sidetrend.points WHERE tracker_id = %1$s;
    UPDATE sidetrend.series SET rebuild = true WHERE tracker_id = %1$s;
    PERFORM pg_notify('sidetrend', %2$L);
    RETURN NULL;
END
$tpl$, t.id, t.id::text);
    EXECUTE format('CREATE OR REPLACE FUNCTION %s() RETURNS trigger LANGUAGE plpgsql SECURITY DEFINER '
                   'SET search_path = pg_catalog, pg_temp AS %L', v_trunc, v_body);

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

-- stop_capture drops a tracker's generated functions (CASCADE drops their
-- triggers, which needs no ownership of the table) and its pending changes:
-- what a paused or broken tracker does until it resumes with a backfill.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.stop_capture(tracker_id int) RETURNS void
LANGUAGE plpgsql SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I() CASCADE', '_capture_' || stop_capture.tracker_id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I() CASCADE', '_truncate_' || stop_capture.tracker_id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I(text)', '_backfill_' || stop_capture.tracker_id);
    EXECUTE format('DROP FUNCTION IF EXISTS sidetrend.%I(text, bigint)', '_recompute_' || stop_capture.tracker_id);
    DELETE FROM sidetrend.changes c WHERE c.tracker_id = stop_capture.tracker_id;
    DELETE FROM sidetrend.resync r WHERE r.tracker_id = stop_capture.tracker_id;
END
$fn$;
-- +goose StatementEnd

-- The caller's identity, for the SECURITY DEFINER functions below: the
-- public wrappers pass current_user, and the login role must be able to act
-- as that role (SET ROLE to it), so passing another name gains nothing.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.check_caller(caller name) RETURNS void
LANGUAGE plpgsql STABLE SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    IF caller IS NULL OR NOT EXISTS (SELECT 1 FROM pg_roles r WHERE r.rolname = caller)
       OR NOT pg_has_role(session_user, caller, 'MEMBER') THEN
        RAISE EXCEPTION 'role "%" may not act as role "%"', session_user, caller
            USING ERRCODE = 'insufficient_privilege',
                  HINT = 'Call sidetrend.track(), untrack(), rebuild(), tune() or request_tune() rather than the functions behind them.';
    END IF;
END
$fn$;
-- +goose StatementEnd

-- check_manage raises unless caller may change tracker t: it owns it (or is
-- a member of its owner), is a member of sidetrend_admin, or is the
-- sidecar's role; with need_read it must also be able to read the source.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.check_manage(caller name, t sidetrend.trackers, verb text, need_read boolean) RETURNS void
LANGUAGE plpgsql STABLE SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    PERFORM sidetrend.check_caller(caller);
    IF NOT (pg_has_role(caller, current_user, 'MEMBER')
            OR (EXISTS (SELECT 1 FROM pg_roles r WHERE r.rolname = t.owner) AND pg_has_role(caller, t.owner, 'MEMBER'))
            OR (EXISTS (SELECT 1 FROM pg_roles r WHERE r.rolname = 'sidetrend_admin') AND pg_has_role(caller, 'sidetrend_admin', 'MEMBER'))) THEN
        RAISE EXCEPTION 'role "%" may not % tracker "%": it belongs to role "%"', caller, verb, t.name, t.owner
            USING ERRCODE = 'insufficient_privilege',
                  HINT = 'Only the role that created a tracker, its members and members of sidetrend_admin may change it.';
    END IF;
    IF need_read AND EXISTS (SELECT 1 FROM pg_class c WHERE c.oid = t.source)
       AND NOT has_table_privilege(caller, t.source, 'SELECT') THEN
        RAISE EXCEPTION 'role "%" may not read %, so it may not % tracker "%"', caller, t.source_name, verb, t.name
            USING ERRCODE = 'insufficient_privilege',
                  HINT = format('Forecasts are derived from the rows. Ask the table''s owner for GRANT SELECT ON %s TO %I.', t.source_name, caller);
    END IF;
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.find_tracker(name text) RETURNS sidetrend.trackers
LANGUAGE plpgsql STABLE SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t sidetrend.trackers;
BEGIN
    SELECT * INTO t FROM sidetrend.trackers tr WHERE tr.name = find_tracker.name;
    IF NOT FOUND THEN
        RAISE EXCEPTION 'no tracker named "%"', find_tracker.name
            USING ERRCODE = 'undefined_object', HINT = 'See SELECT tracker FROM sidetrend.tracker_settings.';
    END IF;
    RETURN t;
END
$fn$;
-- +goose StatementEnd

-- check_settings raises, with what to use instead, when a tracker's
-- settings are not usable: track() and alter_tracker (00009) call it.
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
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use a forgetting factor such as 0.95 (1 means no forgetting), or let the sidecar choose it (track: lambda => NULL; alter_tracker: lambda_auto => true).';
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

DROP FUNCTION IF EXISTS sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int);

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._track_as(
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

    IF _track_as.agg IS NULL OR _track_as.agg NOT IN ('sum', 'mean', 'min', 'max', 'last', 'count') THEN
        RAISE EXCEPTION 'unknown aggregate "%"', _track_as.agg
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use agg => sum, mean, min, max, last or count.';
    END IF;
    IF v_empty NOT IN ('zero', 'gap') THEN
        RAISE EXCEPTION 'empty => "%" is not known', _track_as.empty
            USING ERRCODE = 'invalid_parameter_value', HINT = 'Use empty => ''zero'' (no rows means 0) or ''gap'' (no rows means no information).';
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
CREATE OR REPLACE FUNCTION sidetrend.track(
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
CREATE OR REPLACE FUNCTION sidetrend._untrack_as(caller name, name text) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t sidetrend.trackers := sidetrend.find_tracker(_untrack_as.name);
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'untrack', false);
    PERFORM sidetrend.stop_capture(t.id);
    DELETE FROM sidetrend.points WHERE tracker_id = t.id;
    DELETE FROM sidetrend.rejects WHERE tracker_id = t.id;
    DELETE FROM sidetrend.trackers WHERE id = t.id;
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.untrack(name text) RETURNS void
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._untrack_as(current_user, name);
-- +goose StatementEnd

-- rebuild: the whole tracker (also how a paused or broken tracker resumes:
-- its capture is installed again, after the checks) or one series.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._rebuild_as(caller name, name text, series_key text) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t sidetrend.trackers := sidetrend.find_tracker(_rebuild_as.name);
    v_timeout text := current_setting('lock_timeout');
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'rebuild', true);
    IF _rebuild_as.series_key IS NULL THEN
        IF t.status <> 'active' THEN
            PERFORM set_config('lock_timeout', coalesce(nullif(current_setting('sidetrend.lock_timeout', true), ''), '2s'), true);
            PERFORM sidetrend.install_capture(t.id);
            PERFORM set_config('lock_timeout', v_timeout, true);
        END IF;
        UPDATE sidetrend.trackers SET backfilled = false, status = 'active', last_error = NULL, status_at = NULL WHERE id = t.id;
    ELSIF t.status <> 'active' THEN
        RAISE EXCEPTION 'tracker "%" is %: %', t.name, t.status, t.last_error
            USING ERRCODE = 'object_not_in_prerequisite_state', HINT = format('Rebuild the whole tracker: SELECT sidetrend.rebuild(%L).', t.name);
    ELSE
        INSERT INTO sidetrend.resync (tracker_id, series_key) VALUES (t.id, _rebuild_as.series_key)
        ON CONFLICT DO NOTHING;
    END IF;
    PERFORM pg_notify('sidetrend', t.id::text);
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.rebuild(name text, series_key text DEFAULT NULL) RETURNS void
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._rebuild_as(current_user, name, series_key);
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._request_tune_as(caller name, name text) RETURNS void
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t sidetrend.trackers := sidetrend.find_tracker(_request_tune_as.name);
BEGIN
    PERFORM sidetrend.check_manage(caller, t, 'tune', true);
    INSERT INTO sidetrend.tune_requests (tracker_id, requested_by) VALUES (t.id, caller);
    -- Wake the sidecar; it tunes trackers with a request after its next catch-up.
    PERFORM pg_notify('sidetrend', t.id::text);
END
$fn$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.request_tune(name text) RETURNS void
LANGUAGE sql SECURITY INVOKER
RETURN sidetrend._request_tune_as(current_user, name);
-- +goose StatementEnd

-- _tune_as is tune() of migration 00004 with the owner check.
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

-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.tune(name text, per_series bool DEFAULT false, apply bool DEFAULT false)
RETURNS TABLE (series_key text, lambda float8, memory_buckets float8, rmse_before float8, rmse_after float8)
LANGUAGE sql SECURITY INVOKER
BEGIN ATOMIC
    SELECT * FROM sidetrend._tune_as(current_user, name, per_series, apply);
END;
-- +goose StatementEnd
ALTER FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval)
    SET search_path = pg_catalog, pg_temp;
ALTER FUNCTION sidetrend.untrack(text) SECURITY INVOKER RESET ALL;
ALTER FUNCTION sidetrend.request_tune(text) SECURITY INVOKER RESET ALL;
ALTER FUNCTION sidetrend.tune(text, bool, bool) SECURITY INVOKER RESET ALL;

-- check_trackers is run by the sidecar: it pauses every active tracker
-- whose source, owner or columns fail source_problem (its capture stops and
-- its pending changes go: a backfill takes the table in again on resume)
-- and resumes every paused tracker that passes again (capture installed,
-- backfill due). A dropped source marks the tracker broken, as before;
-- its last forecasts stay. full_check false looks only for dropped tables
-- (cheap: the sidecar does it on every catch-up). It returns the trackers
-- it changed.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.check_trackers(full_check boolean DEFAULT true) RETURNS TABLE (tracker text, status text, reason text)
LANGUAGE plpgsql SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    t sidetrend.trackers;
    p record;
BEGIN
    FOR t IN SELECT * FROM sidetrend.trackers tr
             WHERE tr.status IN ('active', 'paused')
               AND (full_check OR NOT EXISTS (SELECT 1 FROM pg_class c WHERE c.oid = tr.source))
             ORDER BY tr.id LOOP
        p := sidetrend.source_problem(t.source, t.time_col, t.value_col, t.key_cols, t.owner);
        IF p.code IS NOT NULL AND t.status = 'active' THEN
            PERFORM sidetrend.stop_capture(t.id);
            UPDATE sidetrend.trackers tr SET status = CASE WHEN p.code = '42P01' THEN 'broken' ELSE 'paused' END,
                last_error = p.message || '. ' || p.hint, status_at = now(), backfilled = false
            WHERE tr.id = t.id;
            tracker := t.name; status := CASE WHEN p.code = '42P01' THEN 'broken' ELSE 'paused' END; reason := p.message;
            RETURN NEXT;
        ELSIF p.code IS NULL AND t.status = 'paused' THEN
            BEGIN
                PERFORM sidetrend.install_capture(t.id);
                UPDATE sidetrend.trackers tr SET status = 'active', last_error = NULL, status_at = NULL, backfilled = false
                WHERE tr.id = t.id;
                tracker := t.name; status := 'active'; reason := NULL;
                RETURN NEXT;
            EXCEPTION WHEN lock_not_available OR insufficient_privilege THEN
                -- Try again next time (the table is busy, say).
                NULL;
            END;
        END IF;
    END LOOP;
END
$fn$;
-- +goose StatementEnd

-- mark_broken sets a tracker aside after its changes failed to drain: its
-- capture stops, its pending changes go, the error is kept. Its forecasts
-- stay as they were; rebuild(name) resumes it with a full backfill.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.mark_broken(tracker_id int, reason text) RETURNS void
LANGUAGE plpgsql SET client_min_messages = warning SET search_path = pg_catalog, pg_temp AS $fn$
BEGIN
    PERFORM sidetrend.stop_capture(mark_broken.tracker_id);
    UPDATE sidetrend.trackers t SET status = 'broken', backfilled = false, status_at = now(),
        last_error = format('%s; fix the cause, then SELECT sidetrend.rebuild(%L) resumes it with a full backfill', mark_broken.reason, t.name)
    WHERE t.id = mark_broken.tracker_id;
END
$fn$;
-- +goose StatementEnd

-- prune_rejects keeps, per tracker, the newest keep_rows rejects younger
-- than keep_age. The sidecar calls it about once a minute.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.prune_rejects(keep_rows int DEFAULT 10000, keep_age interval DEFAULT '30 days') RETURNS bigint
LANGUAGE sql SET search_path = pg_catalog, pg_temp
BEGIN ATOMIC
    WITH gone AS (
        DELETE FROM sidetrend.rejects r
        WHERE r.at < now() - keep_age
           OR r.id <= (SELECT x.id FROM sidetrend.rejects x WHERE x.tracker_id = r.tracker_id
                      ORDER BY x.id DESC OFFSET keep_rows LIMIT 1)
        RETURNING 1)
    SELECT count(*) FROM gone;
END;
-- +goose StatementEnd
CREATE INDEX IF NOT EXISTS rejects_tracker_id ON sidetrend.rejects (tracker_id, id);

-- may_read: may the current role see what a tracker shows? Yes when it may
-- SELECT the source table; once the table is gone, when it is a member of
-- the tracker's owner.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.may_read(source oid, owner name) RETURNS boolean
LANGUAGE sql STABLE SET search_path = pg_catalog, pg_temp
RETURN CASE WHEN EXISTS (SELECT 1 FROM pg_catalog.pg_class c WHERE c.oid = source)
            THEN coalesce(has_table_privilege(source, 'SELECT'), false)
            ELSE EXISTS (SELECT 1 FROM pg_catalog.pg_roles r WHERE r.rolname = owner AND pg_has_role(r.oid, 'MEMBER')) END;
-- +goose StatementEnd

-- _may_read_tracker is may_read for a role and a tracker id, for the policy
-- on sidetrend.surprises (whose readers may not read sidetrend.trackers).
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend._may_read_tracker(tracker_id int, reader name) RETURNS boolean
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, pg_temp
RETURN (SELECT CASE WHEN EXISTS (SELECT 1 FROM pg_catalog.pg_class c WHERE c.oid = t.source)
                    THEN coalesce(has_table_privilege(reader, t.source, 'SELECT'), false)
                    ELSE EXISTS (SELECT 1 FROM pg_catalog.pg_roles r WHERE r.rolname = t.owner AND pg_has_role(reader, r.oid, 'MEMBER')) END
        FROM sidetrend.trackers t WHERE t.id = _may_read_tracker.tracker_id);
-- +goose StatementEnd

ALTER TABLE sidetrend.surprises ENABLE ROW LEVEL SECURITY;
DROP POLICY IF EXISTS surprises_readable ON sidetrend.surprises;
CREATE POLICY surprises_readable ON sidetrend.surprises FOR SELECT
    USING (coalesce(sidetrend._may_read_tracker(tracker_id, current_user), false));

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
WHERE s.ready AND sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.slopes AS
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
WHERE s.ready AND sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.series_status AS
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

CREATE OR REPLACE VIEW sidetrend.tracker_settings AS
SELECT t.name AS tracker, t.source_name AS source, t.time_col, t.value_col, t.key_cols,
       t.bucket, t.agg, t.empty, t.tz, t.degree, t.period, t.harmonics, t.lambda, t.auto_tune,
       t.burn_in, t.horizon, t.history_buckets, t.backfilled, t.status, t.last_error, t.created_at,
       t.owner, t.span, t.status_at
FROM sidetrend.trackers t
WHERE sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.actuals AS
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
WHERE p.n > 0 AND sidetrend.may_read(t.source, t.owner);

CREATE OR REPLACE VIEW sidetrend.accuracy AS
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
WHERE s.folded_through IS NOT NULL AND sidetrend.may_read(t.source, t.owner);

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
CROSS JOIN LATERAL unnest(i.yhat, i.lo95, i.hi95, i.se) WITH ORDINALITY AS f(yhat, lo95, hi95, se, horizon)
WHERE sidetrend.may_read(t.source, t.owner);

-- Roles: sidetrend_admin may change every tracker.
-- +goose StatementBegin
CREATE OR REPLACE FUNCTION sidetrend.create_roles(reader text DEFAULT 'sidetrend_reader', writer text DEFAULT 'sidetrend_writer')
RETURNS void
LANGUAGE plpgsql SET search_path = pg_catalog, pg_temp AS $fn$
DECLARE
    r      text;
    v_can  boolean := (SELECT rolsuper OR rolcreaterole FROM pg_roles WHERE rolname = current_user);
BEGIN
    FOREACH r IN ARRAY ARRAY[create_roles.reader, create_roles.writer, 'sidetrend_admin'] LOOP
        CONTINUE WHEN EXISTS (SELECT 1 FROM pg_roles WHERE rolname = r);
        IF NOT v_can THEN
            RAISE NOTICE 'role "%" does not exist and role "%" may not create roles: skipped', r, current_user
                USING HINT = 'A role with CREATEROLE can run sql/roles.sql later; the grants follow with SELECT sidetrend.grant_roles().';
            CONTINUE;
        END IF;
        BEGIN
            EXECUTE format('CREATE ROLE %I NOLOGIN', r);
            EXECUTE format('COMMENT ON ROLE %I IS %L', r, CASE WHEN r = create_roles.reader
                THEN 'sidetrend: may read the views and the surprise log, for trackers whose source table it may read'
                WHEN r = create_roles.writer
                THEN 'sidetrend: may read what sidetrend_reader reads and call track(); untrack(), rebuild(), tune() and request_tune() on its own trackers'
                ELSE 'sidetrend: may untrack, rebuild and tune every tracker (give it with the writer role)' END);
        EXCEPTION WHEN duplicate_object OR unique_violation THEN
            -- Created by a migration of another database at the same moment.
            NULL;
        END;
    END LOOP;
END
$fn$;
-- +goose StatementEnd

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
                   AND p.proname IN ('track', 'untrack', 'rebuild', 'tune', 'request_tune',
                                     '_track_as', '_untrack_as', '_rebuild_as', '_tune_as', '_request_tune_as') LOOP
            EXECUTE format('GRANT EXECUTE ON FUNCTION %s TO %I', v, grant_roles.writer);
        END LOOP;
    END IF;
END
$fn$;
-- +goose StatementEnd

-- Nobody but the roles grant_roles names (and the owner) calls these.
-- +goose StatementBegin
DO $$
DECLARE
    f text;
BEGIN
    FOR f IN SELECT p.oid::regprocedure::text FROM pg_proc p
             WHERE p.pronamespace = 'sidetrend'::regnamespace
               AND p.proname IN ('track', 'untrack', 'rebuild', 'tune', 'request_tune',
                                 '_track_as', '_untrack_as', '_rebuild_as', '_tune_as', '_request_tune_as',
                                 '_may_read_tracker', 'install_capture', 'stop_capture', 'check_trackers',
                                 'mark_broken', 'prune_rejects', 'columns_changed', 'check_caller', 'check_manage', 'find_tracker',
                                 'source_problem', 'column_signature', 'recompute_dirty', 'check_settings',
                                 'create_roles', 'grant_roles') LOOP
        EXECUTE format('REVOKE EXECUTE ON FUNCTION %s FROM PUBLIC', f);
    END LOOP;
END
$$;
-- +goose StatementEnd
SELECT sidetrend.create_roles();
SELECT sidetrend.grant_roles();

-- The capture code of every existing tracker is regenerated (the old code
-- is the one with the injectable wrapper). A tracker whose table no longer
-- passes the checks pauses with the reason instead.
-- +goose StatementBegin
DO $$
DECLARE
    t sidetrend.trackers;
    p record;
BEGIN
    FOR t IN SELECT * FROM sidetrend.trackers ORDER BY id LOOP
        CONTINUE WHEN t.status <> 'active';
        p := sidetrend.source_problem(t.source, t.time_col, t.value_col, t.key_cols, t.owner);
        IF p.code IS NULL THEN
            PERFORM sidetrend.install_capture(t.id);
        ELSE
            PERFORM sidetrend.stop_capture(t.id);
            UPDATE sidetrend.trackers SET status = CASE WHEN p.code = '42P01' THEN 'broken' ELSE 'paused' END,
                last_error = p.message || '. ' || p.hint, status_at = now(), backfilled = false
            WHERE id = t.id;
        END IF;
    END LOOP;
END
$$;
-- +goose StatementEnd

COMMENT ON FUNCTION sidetrend.track(regclass, text, text, text[], interval, text, int, float8, int, float8, int, text, text, text, int, interval)
    IS 'Register a tracker on a table: time column, value column, key columns, bucket width, aggregate, model, horizon and span. The calling role becomes its owner. Returns the tracker id.';
COMMENT ON FUNCTION sidetrend.untrack(text) IS 'Remove a tracker, its triggers, series and pending changes (its owner, a member of sidetrend_admin or the sidecar''s role). The source table is not touched.';
COMMENT ON FUNCTION sidetrend.rebuild(text, text) IS 'Read a tracker (or one series) again from its source table; also resumes a paused or broken tracker. Its owner or a member of sidetrend_admin.';
COMMENT ON FUNCTION sidetrend.source_problem(oid, text, text, text[], name) IS 'Internal: what keeps sidetrend from reading a table safely (missing or wrongly typed columns, row-level security, missing grants, an owner that may not read it), or a NULL code.';
COMMENT ON FUNCTION sidetrend.check_caller(name) IS 'Internal: raises unless the session''s login role may act as the given role (the public wrappers pass current_user).';
COMMENT ON FUNCTION sidetrend.check_manage(name, sidetrend.trackers, text, boolean) IS 'Internal: raises unless the role owns the tracker (or is a member of its owner, of sidetrend_admin, or the sidecar''s role), and, when asked, may read its source.';
COMMENT ON FUNCTION sidetrend.column_signature(oid, text[]) IS 'Internal: the type oids of the named columns ordered by name, as each capture statement checks them.';
COMMENT ON FUNCTION sidetrend.columns_changed(int) IS 'Internal: what a capture statement does when the tracked columns changed name or type: the tracker waits for a backfill, after the sidecar checked the table again.';
COMMENT ON FUNCTION sidetrend.find_tracker(text) IS 'Internal: the tracker of that name, or an error that says where to look.';
COMMENT ON FUNCTION sidetrend.stop_capture(int) IS 'Internal: drop a tracker''s generated functions and triggers and its pending changes (paused, broken, untracked).';
COMMENT ON FUNCTION sidetrend.check_trackers(boolean) IS 'Internal, run by the sidecar: pause trackers whose table fails source_problem, resume those that pass again (full_check false: only mark trackers whose table was dropped broken).';
COMMENT ON FUNCTION sidetrend.mark_broken(int, text) IS 'Internal, run by the sidecar: set aside a tracker whose changes failed to drain.';
COMMENT ON FUNCTION sidetrend.prune_rejects(int, interval) IS 'Delete rejects older than keep_age and all but the newest keep_rows per tracker; returns how many went.';
COMMENT ON FUNCTION sidetrend.may_read(oid, name) IS 'Whether the current role may see a tracker: it may SELECT the source table (or, once the table is gone, is a member of the tracker''s owner). Every view filters with it.';
COMMENT ON TABLE sidetrend.rejects IS 'Source rows that were not folded in (NULL, NaN, infinite or too large values, times outside the tracker''s span, keys over 1000 bytes): the tracked columns as text and the reason. Pruned by the sidecar (prune_rejects).';

-- +goose Down
-- Down keeps everything: stepping back a version must not reopen the holes
-- this migration closes, and the code of version 6 works with it (track()
-- takes the same named arguments; paused trackers are left alone). Up is
-- written to run again over it.
SELECT 1;
