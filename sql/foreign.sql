-- Attach sidetrend's live endpoint to an analyst's database with the stock
-- postgres_fdw, so that plain SQL can read forecasts for any horizon,
-- what-if refits with another forgetting factor, and backtests, all
-- computed by the sidecar when the query runs.
--
-- Run it with psql as a role that may create extensions and servers:
--
--   psql -v password=secret -f sql/foreign.sql
--
-- psql variables (set them with -v name=value):
--   host        the sidecar's host              default 127.0.0.1
--   port        its SQL endpoint's port         default 5488
--   user        endpoint user                   default sidetrend
--   password    that user's password            required (SIDETREND_SQL_PASSWORD on the sidecar)
--   local_role  local role the mapping is for   default PUBLIC (every local role; the grants
--                                               below still decide who may read)
--
-- Running it again updates the server address and the mapping's
-- credentials and recreates the foreign tables.
--
-- Roles that exist get access: sidetrend_reader may select from the three
-- tables. Read-only: inserts, updates, deletes and TRUNCATE are refused
-- locally (updatable 'false', truncatable 'false'), without a round trip.

\set ON_ERROR_STOP on
\if :{?host}
\else
\set host 127.0.0.1
\endif
\if :{?port}
\else
\set port 5488
\endif
\if :{?user}
\else
\set user sidetrend
\endif
\if :{?local_role}
\else
\set local_role PUBLIC
\endif
\if :{?password}
\else
DO $nopassword$ BEGIN
    RAISE EXCEPTION 'sql/foreign.sql needs the endpoint password'
        USING HINT = 'run psql with -v password=... (the sidecar reads it from SIDETREND_SQL_PASSWORD)';
END $nopassword$;
\endif

BEGIN;

CREATE EXTENSION IF NOT EXISTS postgres_fdw;

-- fetch_size 1000: a forecast of many horizons comes back in fewer round
-- trips than the default 100. use_remote_estimate stays off: the endpoint
-- computes rows on demand and does not answer EXPLAIN.
CREATE SERVER IF NOT EXISTS sidetrend_live FOREIGN DATA WRAPPER postgres_fdw
    OPTIONS (host :'host', port :'port', dbname 'sidetrend', fetch_size '1000', use_remote_estimate 'false');
ALTER SERVER sidetrend_live OPTIONS (SET host :'host', SET port :'port');

CREATE USER MAPPING IF NOT EXISTS FOR :local_role SERVER sidetrend_live
    OPTIONS (user :'user', password :'password');
ALTER USER MAPPING FOR :local_role SERVER sidetrend_live
    OPTIONS (SET user :'user', SET password :'password');

CREATE SCHEMA IF NOT EXISTS sidetrend_live;

-- Text columns are COLLATE "C": the endpoint compares and sorts text byte
-- by byte, and the local planner must know that when it relies on an
-- ORDER BY the endpoint applied.

-- forecast: one row per series, lambda and horizon. A condition that bounds
-- horizon is required (WHERE horizon <= 30, = 7, IN (1, 7, 30), BETWEEN 1
-- AND 12; any horizon up to 10000). Without a condition on lambda the rows
-- come from the sidecar's stored fit and lambda is the tracker's; with
-- lambda = x or lambda IN (...) each series is refitted with that lambda.
-- period_start is the start of the bucket being forecast.
DROP FOREIGN TABLE IF EXISTS sidetrend_live.forecast;
CREATE FOREIGN TABLE sidetrend_live.forecast (
    tracker      text COLLATE "C" NOT NULL,
    series_key   text COLLATE "C" NOT NULL,
    lambda       double precision NOT NULL,
    horizon      integer NOT NULL,
    period_start timestamptz,
    forecast         double precision,
    lower80         double precision,
    upper80         double precision,
    lower95         double precision,
    upper95         double precision,
    cum_forecast     double precision,
    cum_lower95     double precision,
    cum_upper95     double precision,
    data_buckets    bigint,
    reach           double precision
) SERVER sidetrend_live
  OPTIONS (schema_name 'sidetrend_live', table_name 'forecast', updatable 'false', truncatable 'false');

-- backtest: one-step-ahead errors of each series over its history, for each
-- lambda asked for (lambda = x, IN (...)), or for the default grid of 40
-- lambdas from 0.5 to 0.999 without a lambda condition.
DROP FOREIGN TABLE IF EXISTS sidetrend_live.backtest;
CREATE FOREIGN TABLE sidetrend_live.backtest (
    tracker    text COLLATE "C" NOT NULL,
    series_key text COLLATE "C" NOT NULL,
    lambda     double precision NOT NULL,
    n_errors   bigint,
    mae        double precision,
    rmse       double precision,
    mape       double precision,
    coverage95 double precision
) SERVER sidetrend_live
  OPTIONS (schema_name 'sidetrend_live', table_name 'backtest', updatable 'false', truncatable 'false');

-- series: what the sidecar tracks, with each series' model and state.
-- period is NULL for a model without seasonal terms.
DROP FOREIGN TABLE IF EXISTS sidetrend_live.series;
CREATE FOREIGN TABLE sidetrend_live.series (
    tracker      text COLLATE "C" NOT NULL,
    series_key   text COLLATE "C" NOT NULL,
    points       bigint,
    first_bucket timestamptz,
    last_bucket  timestamptz,
    lambda       double precision,
    degree       integer,
    period       double precision,
    harmonics    integer,
    state        text COLLATE "C"
) SERVER sidetrend_live
  OPTIONS (schema_name 'sidetrend_live', table_name 'series', updatable 'false', truncatable 'false');

DO $grants$
BEGIN
    IF EXISTS (SELECT 1 FROM pg_catalog.pg_roles WHERE rolname = 'sidetrend_reader') THEN
        GRANT USAGE ON FOREIGN SERVER sidetrend_live TO sidetrend_reader;
        GRANT USAGE ON SCHEMA sidetrend_live TO sidetrend_reader;
        GRANT SELECT ON sidetrend_live.forecast, sidetrend_live.backtest, sidetrend_live.series TO sidetrend_reader;
    END IF;
END
$grants$;

COMMIT;
