-- Calendar buckets: the bucket number of a time and the instant a bucket
-- starts, for a width (months, days or a fixed length of time) in a time
-- zone. The Go package calendar computes the same numbers; its tests check
-- both against each other on a live server.
--
-- Buckets count from the origin 2001-01-01 00:00 local time (a Monday), with
-- floor division (times before 2001 have negative numbers):
--
--   months width n   i = floor(((year - 2001) * 12 + month - 1) / n)   local year and month
--   days width n     i = floor((local date - 2001-01-01) / n)
--   time width w     i = floor((t - origin) / w)                        origin = 2001-01-01 00:00 local
--
-- A bucket of months or days starts at local midnight of its first day;
-- where that midnight occurs twice (clocks set back to midnight) at the first
-- of the two, and where it does not exist (clocks set forward at midnight) at
-- Postgres' reading of it (the offset before the gap), which is the first
-- instant after a gap that begins at midnight (the Go package documents the
-- one historical gap that began before midnight).
--
-- The functions are IMMUTABLE: given the same width and an explicit zone
-- they always answer the same, except when the time zone database itself is
-- updated (the usual caveat for time zone rules). They are plain SQL
-- expressions that the planner inlines; with a constant width and zone the
-- width tests and the origin fold into constants at plan time.

-- +goose Up
CREATE SCHEMA IF NOT EXISTS sidetrend;

-- +goose StatementBegin
CREATE FUNCTION sidetrend.bucket_check(width interval) RETURNS void
LANGUAGE plpgsql IMMUTABLE PARALLEL SAFE AS $$
DECLARE
    -- The interval's three fields, as Postgres stores them.
    months bigint := date_part('year', width)::bigint * 12 + date_part('month', width)::bigint;
    days   bigint := date_part('day', width)::bigint;
    micros bigint := date_part('hour', width)::bigint * 3600000000
                   + date_part('minute', width)::bigint * 60000000
                   + date_part('microseconds', width)::bigint;
    kinds  int := (months <> 0)::int + (days <> 0)::int + (micros <> 0)::int;
    total  bigint;
    fixed  text := '''6 hours''';
BEGIN
    IF width IS NULL THEN
        RAISE EXCEPTION 'bucket width is missing: give an interval such as ''1 day'', ''1 hour'' or ''1 month'''
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF kinds = 0 THEN
        RAISE EXCEPTION 'bucket width ''%'' is zero: use a positive interval such as ''1 day''', width
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF kinds > 1 AND months <> 0 THEN
        RAISE EXCEPTION 'bucket width ''%'' mixes months with days or hours: months have no fixed length, so write whole months such as ''1 mon'' or ''3 mons'', or days or hours alone', width
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF kinds > 1 THEN
        total := days * 86400000000 + micros;
        IF total > 0 AND total % 3600000000 = 0 THEN
            fixed := format('''%s hours''', total / 3600000000);
        ELSIF total > 0 AND total % 60000000 = 0 THEN
            fixed := format('''%s minutes''', total / 60000000);
        ELSIF total > 0 AND total % 1000000 = 0 THEN
            fixed := format('''%s seconds''', total / 1000000);
        END IF;
        RAISE EXCEPTION 'bucket width ''%'' mixes days with hours: a day follows the local calendar (23 or 25 hours across a DST change), so write whole days such as ''1 day'' or a fixed length such as %', width, fixed
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF months < 0 OR days < 0 OR micros < 0 THEN
        RAISE EXCEPTION 'bucket width ''%'' is negative: use a positive interval such as ''%''', width, -width
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF micros > 0 AND micros < 1000000 THEN
        RAISE EXCEPTION 'bucket width ''%'' is shorter than one second: use at least ''00:00:01''', width
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF micros % 1000000 <> 0 THEN
        RAISE EXCEPTION 'bucket width ''%'' is not a whole number of seconds: round it, for example to ''%''', width,
            width - make_interval(secs => (micros % 1000000) / 1000000.0)
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
END
$$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.zone_check(tz text) RETURNS void
LANGUAGE plpgsql STABLE PARALLEL SAFE AS $$
BEGIN
    IF tz IS NULL OR tz = '' THEN
        RAISE EXCEPTION 'time zone is empty: give an IANA name such as ''UTC'' or ''Europe/Berlin'''
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    -- AT TIME ZONE looks a name up among the abbreviations first ('CET',
    -- 'EST' are fixed offsets there) and only then among the zones.
    IF tz <> 'UTC' AND strpos(tz, '/') = 0 THEN
        RAISE EXCEPTION 'time zone "%" is not a region name: use ''UTC'' or a name such as ''Europe/Berlin'' (Postgres reads short names like ''CET'' as fixed offsets)', tz
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF starts_with(tz, 'right/') THEN
        RAISE EXCEPTION 'time zone "%" counts leap seconds, which Postgres does not: use "%"', tz, substr(tz, 7)
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
    IF NOT EXISTS (SELECT 1 FROM pg_timezone_names WHERE name = tz) THEN
        RAISE EXCEPTION 'time zone "%" is not known: use an IANA name such as ''UTC'' or ''Europe/Berlin'' (names are case-sensitive; see pg_timezone_names)', tz
            USING ERRCODE = 'invalid_parameter_value';
    END IF;
END
$$;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE FUNCTION sidetrend.bucket_reject(width interval, result anyelement) RETURNS anyelement
LANGUAGE plpgsql IMMUTABLE PARALLEL SAFE AS $$
BEGIN
    PERFORM sidetrend.bucket_check(width);
    RAISE EXCEPTION 'bucket width ''%'' has no bucket kind', width USING ERRCODE = 'internal_error';
END
$$;
-- +goose StatementEnd

-- The kind of a valid width: 1 months, 2 days, 3 a whole number of seconds
-- (at least one); 0 for anything else. date_trunc('month', w) keeps the
-- months of an interval, date_trunc('day', w) its months and days.
CREATE FUNCTION sidetrend.bucket_kind(width interval) RETURNS int
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE
    WHEN width - date_trunc('month', width) = interval '0' AND date_trunc('month', width) > interval '0' THEN 1
    WHEN width - date_trunc('day', width) = interval '0' AND date_trunc('month', width) = interval '0'
         AND width > interval '0' THEN 2
    WHEN date_trunc('day', width) = interval '0' AND width >= interval '1 second'
         AND date_trunc('second', width) = width THEN 3
    ELSE 0
END;

-- floor(a / n) for n > 0 with a used once, so that the expression passed as a
-- inlines without being evaluated twice: shift a by a multiple of n (more
-- than 10^13, beyond any bucket number of a Postgres timestamp) to make it
-- non-negative, where integer division truncates and floors alike.
CREATE FUNCTION sidetrend.floor_div(a bigint, n bigint) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN (a + n * (10000000000000 / n + 1)) / n - (10000000000000 / n + 1);

-- The number of months from 2001-01 to the month that starts on first (the
-- 1st of a month), from its day count alone, so that the local time is
-- converted once and decomposed once (date_part('year') and
-- date_part('month') would each do both). The 1st of month k after 2001-01
-- lies D days after 2001-01-01 with 4800 * D - 146097 * k between -14922 and
-- 6159 (computed over years 1 to 9999), and since 4800 months are exactly
-- 146097 days (400 Gregorian years) that holds for every k. So
-- k = floor((4800 * D + c) / 146097) for any c from 14922 to 139937; 77429
-- is the middle. The tests compare it with year * 12 + month for every
-- month of years 1 to 9999.
CREATE FUNCTION sidetrend.month_number(first date) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN sidetrend.floor_div(4800 * (first - DATE '2001-01-01')::bigint + 77429, 146097);

-- The first instant whose wall clock in tz reads wall. Where the reading
-- occurs twice, the first of the two; where it does not exist, Postgres'
-- reading (wall AT TIME ZONE tz takes the offset in force before the gap).
-- The earlier candidate reads wall with the offset in force a day before.
-- Arithmetic runs on UTC timestamps: timestamp + interval is immutable,
-- timestamptz + interval is not.
CREATE FUNCTION sidetrend.wall_to_instant(wall timestamp, tz text) RETURNS timestamptz
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE
    WHEN ((((wall - interval '1 day') AT TIME ZONE tz) AT TIME ZONE 'UTC' + interval '1 day') AT TIME ZONE 'UTC')
             < (wall AT TIME ZONE tz)
         AND (((((wall - interval '1 day') AT TIME ZONE tz) AT TIME ZONE 'UTC' + interval '1 day') AT TIME ZONE 'UTC')
             AT TIME ZONE tz) = wall
    THEN (((wall - interval '1 day') AT TIME ZONE tz) AT TIME ZONE 'UTC' + interval '1 day') AT TIME ZONE 'UTC'
    ELSE wall AT TIME ZONE tz
END;

CREATE FUNCTION sidetrend.bucket_index(t timestamptz, width interval, tz text) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE sidetrend.bucket_kind(width)
    WHEN 1 THEN sidetrend.floor_div(
        sidetrend.month_number(date_trunc('month', t AT TIME ZONE tz)::date),
        (date_part('year', width) * 12 + date_part('month', width))::bigint)
    WHEN 2 THEN sidetrend.floor_div((t AT TIME ZONE tz)::date - DATE '2001-01-01', date_part('day', width)::bigint)
    WHEN 3 THEN sidetrend.floor_div(
        floor(extract(epoch FROM t - sidetrend.wall_to_instant(TIMESTAMP '2001-01-01', tz)))::bigint,
        date_part('epoch', width)::bigint)
    ELSE sidetrend.bucket_reject(width, NULL::bigint)
END;

CREATE FUNCTION sidetrend.bucket_index(t timestamp, width interval, tz text) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE sidetrend.bucket_kind(width)
    WHEN 1 THEN sidetrend.floor_div(
        sidetrend.month_number(date_trunc('month', t)::date),
        (date_part('year', width) * 12 + date_part('month', width))::bigint)
    WHEN 2 THEN sidetrend.floor_div(t::date - DATE '2001-01-01', date_part('day', width)::bigint)
    WHEN 3 THEN sidetrend.bucket_index(t AT TIME ZONE tz, width, tz)
    ELSE sidetrend.bucket_reject(width, NULL::bigint)
END;

CREATE FUNCTION sidetrend.bucket_index(t date, width interval, tz text) RETURNS bigint
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN sidetrend.bucket_index(t::timestamp, width, tz);

CREATE FUNCTION sidetrend.bucket_start(i bigint, width interval, tz text) RETURNS timestamptz
LANGUAGE sql IMMUTABLE PARALLEL SAFE
RETURN CASE sidetrend.bucket_kind(width)
    WHEN 1 THEN sidetrend.wall_to_instant(TIMESTAMP '2001-01-01'
        + make_interval(months => (i * (date_part('year', width) * 12 + date_part('month', width))::bigint)::int), tz)
    WHEN 2 THEN sidetrend.wall_to_instant((DATE '2001-01-01' + (i * date_part('day', width)::bigint)::int)::timestamp, tz)
    WHEN 3 THEN (sidetrend.wall_to_instant(TIMESTAMP '2001-01-01', tz) AT TIME ZONE 'UTC'
        + make_interval(days => (i * date_part('epoch', width)::bigint / 86400)::int,
                        secs => (i * date_part('epoch', width)::bigint % 86400)::float8)) AT TIME ZONE 'UTC'
    ELSE sidetrend.bucket_reject(width, NULL::timestamptz)
END;

COMMENT ON FUNCTION sidetrend.bucket_check(interval)
    IS 'Raise invalid_parameter_value (22023) unless the interval is a bucket width: one positive whole number of months, of days, or of seconds (at least one); the message says what to write instead.';
COMMENT ON FUNCTION sidetrend.zone_check(text)
    IS 'Raise invalid_parameter_value (22023) unless the name is ''UTC'' or an IANA region name Postgres knows (short names such as ''CET'' are refused: AT TIME ZONE reads them as fixed-offset abbreviations).';
COMMENT ON FUNCTION sidetrend.bucket_reject(interval, anyelement)
    IS 'Internal: raise the bucket_check error for a width the bucket functions cannot use.';
COMMENT ON FUNCTION sidetrend.bucket_kind(interval)
    IS 'Internal: 1 for a width of months, 2 of days, 3 of whole seconds, 0 for an invalid width.';
COMMENT ON FUNCTION sidetrend.floor_div(bigint, bigint)
    IS 'Internal: floor(a / n) for n > 0 and |a| < 10^13.';
COMMENT ON FUNCTION sidetrend.month_number(date)
    IS 'Internal: months from 2001-01 to the month that starts on the given 1st of a month.';
COMMENT ON FUNCTION sidetrend.wall_to_instant(timestamp, text)
    IS 'The first instant whose wall clock in the zone reads the timestamp; in a DST gap, the reading with the offset before the gap.';
COMMENT ON FUNCTION sidetrend.bucket_index(timestamptz, interval, text)
    IS 'Bucket number of an instant for a width (months, days or whole seconds) in a zone, counted from 2001-01-01 00:00 local with floor division.';
COMMENT ON FUNCTION sidetrend.bucket_index(timestamp, interval, text)
    IS 'Bucket number of a wall-clock reading taken as local time in the zone: months and days by its date, fixed widths via AT TIME ZONE.';
COMMENT ON FUNCTION sidetrend.bucket_index(date, interval, text)
    IS 'Bucket number of a local date (its midnight for fixed widths), as for timestamp.';
COMMENT ON FUNCTION sidetrend.bucket_start(bigint, interval, text)
    IS 'The instant bucket i starts: local midnight of its first day for months and days (the first one where midnight occurs twice), origin + i * width for fixed widths.';

-- +goose Down
DROP FUNCTION sidetrend.bucket_start(bigint, interval, text);
DROP FUNCTION sidetrend.bucket_index(date, interval, text);
DROP FUNCTION sidetrend.bucket_index(timestamp, interval, text);
DROP FUNCTION sidetrend.bucket_index(timestamptz, interval, text);
DROP FUNCTION sidetrend.wall_to_instant(timestamp, text);
DROP FUNCTION sidetrend.month_number(date);
DROP FUNCTION sidetrend.floor_div(bigint, bigint);
DROP FUNCTION sidetrend.bucket_kind(interval);
DROP FUNCTION sidetrend.bucket_reject(interval, anyelement);
DROP FUNCTION sidetrend.zone_check(text);
DROP FUNCTION sidetrend.bucket_check(interval);
