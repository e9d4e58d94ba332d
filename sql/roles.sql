-- Roles for sidetrend: who runs it, who reads it, who changes what it tracks.
--
-- Run the parts you need as a role with CREATEROLE (a superuser, or your
-- DBA's admin role). `sidetrend migrate` does steps 2 and 3 by itself when
-- the role it runs as may create roles; when it may not, it prints a NOTICE
-- and carries on, and you run steps 2 and 3 here later.
--
--   sidetrend            the sidecar's own login role: owns schema sidetrend,
--                        runs migrations, the triggers and the drain. No
--                        superuser.
--   sidetrend_reader     SELECT on every sidetrend view and on the two output
--                        logs sidetrend.surprises and sidetrend.forecast_history;
--                        nothing on the internal tables (trackers, changes,
--                        points, series, rejects, tuning, tune_requests).
--                        forecast_history, accuracy_by_horizon and
--                        rejected_rows (the rejects with tracker names) show a
--                        reader only trackers whose source table it may SELECT.
--   sidetrend_writer     what the reader has, plus EXECUTE on sidetrend.track(),
--                        untrack(), tune() and request_tune().
--
-- How the rights fit together
--
--   * track(), untrack() and tune() are SECURITY DEFINER with a fixed
--     search_path: they run as the sidecar's role, so a writer needs neither
--     ownership of the tables it tracks nor any right on sidetrend's tables.
--   * In exchange, the role that logged in (session_user) must be allowed to
--     SELECT a table to track, untrack or tune it. Forecasts, slopes and
--     errors are computed from the rows: tracking a table you cannot read
--     would let you read it through the views. (The check is on session_user
--     because inside a SECURITY DEFINER function current_user is the owner;
--     a role reached with SET ROLE counts as the login role that set it.)
--   * The capture triggers are SECURITY DEFINER too: anyone who may INSERT,
--     UPDATE or DELETE the tracked table may keep doing so with no grant on
--     sidetrend, and nobody can write sidetrend's tables through them.
--   * The sidecar's role needs, on each tracked table: SELECT (the backfill
--     reads it), TRIGGER (to install the capture triggers) and UPDATE (only
--     because the backfill takes a SHARE lock while it reads the table whole,
--     and Postgres 15 grants that lock mode only with UPDATE, DELETE or
--     TRUNCATE). track() checks all three and says which grant is missing.
--   * untrack() drops the triggers, which Postgres allows only to the
--     table's owner: until untrack() drops them through the capture function
--     instead, untrack a table the sidecar's role does not own as its owner.

-- 1. The sidecar's role (once per cluster), and its rights in this database
--    (psql fills in :"DBNAME"). Pick your own password, or use your usual
--    authentication.
CREATE ROLE sidetrend LOGIN PASSWORD 'change me';
GRANT CREATE ON DATABASE :"DBNAME" TO sidetrend;   -- to create schema sidetrend
-- then, as that role:  sidetrend migrate --db postgres://sidetrend@host/db

-- 2. The roles for people (skips roles that exist).
SELECT sidetrend.create_roles();
-- or with your own names:  SELECT sidetrend.create_roles('bi_readers', 'finance_planners');

-- 3. Their rights on the views and functions. Run it again after an upgrade
--    that adds views (as the sidecar's role or a superuser).
SELECT sidetrend.grant_roles();
-- or:  SELECT sidetrend.grant_roles('bi_readers', 'finance_planners');

-- 4. People.
GRANT sidetrend_reader TO alice;     -- reads forecasts, slopes, accuracy, surprises
GRANT sidetrend_writer TO bogdan;    -- also tracks, untracks and tunes

-- 5. Per tracked table, as the table's owner: what the sidecar needs ...
GRANT SELECT, TRIGGER, UPDATE ON public.sales TO sidetrend;
-- ... and nothing for the people who write the table: their INSERTs are
-- captured by the triggers. A writer who tracks the table needs SELECT on it:
GRANT SELECT ON public.sales TO bogdan;
