-- Run once by the postgres image on a new data directory (mounted into
-- /docker-entrypoint-initdb.d by docker-compose.yml), as the image's
-- superuser. The sidecar then connects as its own role, which is no
-- superuser: README, Security, has the same set-up for any server.
--
-- The passwords are for a local trial only: change them (or use secrets)
-- anywhere else.
CREATE ROLE sidetrend LOGIN PASSWORD 'sidetrend' NOSUPERUSER NOCREATEDB NOCREATEROLE;
GRANT CREATE ON DATABASE sidetrend TO sidetrend;   -- schema sidetrend, and the demo's schema
-- The roles for people (the migration grants them their rights).
CREATE ROLE sidetrend_reader NOLOGIN;
CREATE ROLE sidetrend_writer NOLOGIN;
CREATE ROLE sidetrend_admin NOLOGIN;
