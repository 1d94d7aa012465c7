-- PostgreSQL set-up for ohmline. Run once as a superuser:
--   psql -v ON_ERROR_STOP=1 -v pw='a-long-random-password' -f postgres-setup.sql
-- then give every ohmline process
--   OHMLINE_DATABASE=postgres://ohmline:<password>@<host>:5432/ohmline
-- The service creates and upgrades its own tables (migrations at start, or
-- `ohmline migrate`); it needs no superuser rights.

-- The service's login role: owns its database, nothing else.
CREATE ROLE ohmline LOGIN PASSWORD :'pw'
    NOSUPERUSER NOCREATEDB NOCREATEROLE NOREPLICATION
    -- Each process keeps a pool of at most 16 connections: api + workers × 16
    -- plus room for `ohmline` commands. Raise it when adding processes.
    CONNECTION LIMIT 100;

CREATE DATABASE ohmline OWNER ohmline ENCODING 'UTF8' TEMPLATE template0;

-- Only its owner (and superusers) may connect.
REVOKE CONNECT, TEMPORARY ON DATABASE ohmline FROM PUBLIC;
GRANT CONNECT, TEMPORARY ON DATABASE ohmline TO ohmline;

\connect ohmline
-- The schema the tables go into belongs to the service's role.
ALTER SCHEMA public OWNER TO ohmline;
REVOKE CREATE ON SCHEMA public FROM PUBLIC;

-- Safety net: a transaction left idle (a stuck client) never holds locks for
-- long; the service never idles inside a transaction.
ALTER ROLE ohmline IN DATABASE ohmline SET idle_in_transaction_session_timeout = '10min';
ALTER ROLE ohmline IN DATABASE ohmline SET timezone = 'UTC';

-- Optional: a read-only role for pg_dump backups run by another account.
-- CREATE ROLE ohmline_backup LOGIN PASSWORD '…';
-- GRANT CONNECT ON DATABASE ohmline TO ohmline_backup;
-- GRANT pg_read_all_data TO ohmline_backup;   -- PostgreSQL 14 and later
