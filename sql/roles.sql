-- Roles for sidetrend: who runs it, who reads it, who changes what it tracks.
--
-- Run the parts you need as a role with CREATEROLE (a superuser, or your
-- DBA's admin role). `sidetrend migrate` does steps 2 and 3 by itself when
-- the role it runs as may create roles; when it may not, it prints a NOTICE
-- and carries on, and you run steps 2 and 3 here later.
--
--   sidetrend            the sidecar's own login role: owns schema sidetrend,
--                        runs migrations, the triggers and the drain. No
--                        superuser, no CREATEROLE.
--   sidetrend_reader     SELECT on every sidetrend view and on the surprise log
--                        sidetrend.surprises, showing only the trackers whose
--                        source table the reader may SELECT; nothing on the
--                        internal tables (trackers, changes, points, series,
--                        rejects, tuning, tune_requests); rejected_rows shows
--                        the rejects of those trackers.
--   sidetrend_writer     what the reader has, plus track(); untrack(),
--                        rebuild(), tune() and request_tune() on the trackers it
--                        owns (the ones it created).
--   sidetrend_admin      untrack, rebuild and tune every tracker; grant it
--                        together with sidetrend_writer.
--
-- How the rights fit together
--
--   * track(), untrack(), rebuild(), tune() and request_tune() pass the
--     caller's current_user to SECURITY DEFINER functions (fixed
--     search_path) that run as the sidecar's role, so a writer needs neither
--     ownership of the tables it tracks nor any right on sidetrend's tables.
--     Those functions accept the name only if the login role may act as it
--     (SET ROLE counts: the role you set is the one checked).
--   * The caller must be allowed to SELECT a table to track it, and to tune or
--     rebuild a tracker. Forecasts, slopes and errors are computed from the
--     rows: tracking a table you cannot read would let you read it through
--     the views. A tracker whose owner loses SELECT pauses.
--   * The capture triggers are SECURITY DEFINER too: anyone who may INSERT,
--     UPDATE or DELETE the tracked table may keep doing so with no grant on
--     sidetrend, and nobody can write sidetrend's tables through them.
--   * The sidecar's role needs, on each tracked table: USAGE on its schema,
--     SELECT (the backfill reads it) and TRIGGER (to install the capture
--     triggers). No UPDATE: the backfill takes no lock that blocks writers.
--     track() checks these and says which grant is missing.
--   * Tracked columns must have built-in types, and tables with row-level
--     security are refused: the sidecar never runs a cast, operator or
--     policy that a table's owner wrote (README, Security).

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
GRANT sidetrend_writer TO bogdan;    -- also tracks; untracks and tunes his own trackers
GRANT sidetrend_writer, sidetrend_admin TO chioma;  -- may manage every tracker

-- 5. Per tracked table, as the table's owner: what the sidecar needs ...
GRANT USAGE ON SCHEMA public TO sidetrend;
GRANT SELECT, TRIGGER ON public.sales TO sidetrend;
-- ... and nothing for the people who write the table: their INSERTs are
-- captured by the triggers. A writer who tracks the table needs SELECT on it:
GRANT SELECT ON public.sales TO bogdan;
