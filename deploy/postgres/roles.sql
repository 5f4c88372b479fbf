-- PostgreSQL roles of ventderive. Idempotent: run it again after any change.
-- Run as a role with CREATEROLE (or a superuser), connected to the service's
-- database:  psql "$ADMIN_URL" -v ON_ERROR_STOP=1 -f deploy/postgres/roles.sql
--
--   ventderive_owner     owns the schema and runs `ventderive migrate`.
--   ventderive_writer    the service (`ventderive serve`): SELECT and INSERT on the
--                        provenance tables, UPDATE only of outbox.published_at and
--                        of the head table, no DELETE, no DDL.
--   ventderive_reviewer  read-only, on the review_* views only: no base table, no
--                        raw payload, no keyed patient hash.
--
-- The roles may log in, but get no password here: set one (or use client
-- certificates) outside version control, e.g. \password ventderive_writer.
-- The database should be created owned by the owner role:
--   CREATE DATABASE ventderive OWNER ventderive_owner;
-- Rights on the tables are granted by the function ventderive_apply_grants(),
-- which every `ventderive migrate` runs; this file runs it too when the schema
-- exists already, so roles and migrations may be applied in either order.

DO $$
BEGIN
    IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_owner') THEN
        CREATE ROLE ventderive_owner LOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE NOINHERIT;
    END IF;
    IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        CREATE ROLE ventderive_writer LOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE NOINHERIT;
    END IF;
    IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_reviewer') THEN
        CREATE ROLE ventderive_reviewer LOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE NOINHERIT;
    END IF;
END
$$;

-- Settings that hold for every session of a role (reason: a stuck transaction
-- must not hold patient locks or pool connections; statement parameters hold
-- patient data and must not reach the server log).
-- A replica frozen mid-transaction (SIGSTOP, a stalled VM) holds its patient
-- locks until the server ends its session: 15 s of idleness ends it (the
-- service's transactions are never idle that long: the longest wait inside
-- one is the relay's 5 s publish deadline). A lock wait gives up after 2 s
-- (the service's transactions take milliseconds); the service then records
-- the rest of that group message by message, so only the locked patient's
-- messages wait.
ALTER ROLE ventderive_writer SET statement_timeout = '30s';
ALTER ROLE ventderive_writer SET idle_in_transaction_session_timeout = '15s';
ALTER ROLE ventderive_writer SET lock_timeout = '2s';
ALTER ROLE ventderive_reviewer SET statement_timeout = '120s';
ALTER ROLE ventderive_reviewer SET idle_in_transaction_session_timeout = '60s';
ALTER ROLE ventderive_reviewer SET default_transaction_read_only = on;

-- Only the owner creates objects in the service's database; nobody else
-- connects unless granted. The other databases of the cluster (postgres,
-- template1, the site's own) keep PostgreSQL's CONNECT for PUBLIC, which no
-- role can leave: deploy/postgres/pg_hba.conf keeps these roles out of them.
DO $$
BEGIN
    EXECUTE format('REVOKE ALL ON DATABASE %I FROM PUBLIC', current_database());
    EXECUTE format('GRANT CONNECT ON DATABASE %I TO ventderive_owner, ventderive_writer, ventderive_reviewer', current_database());
    EXECUTE format('GRANT CREATE, TEMPORARY ON DATABASE %I TO ventderive_owner', current_database());
END
$$;
REVOKE CREATE ON SCHEMA public FROM PUBLIC;
GRANT USAGE, CREATE ON SCHEMA public TO ventderive_owner;
GRANT USAGE ON SCHEMA public TO ventderive_writer, ventderive_reviewer;

-- Keep patient data out of the server log. Statement parameters are never
-- logged, even when a statement is; an error is logged tersely (without the
-- DETAIL line, which for a constraint violation is "Failing row contains
-- (...)" with the row's values) and without the failing statement. The
-- decoder refuses what the constraints check, so a constraint error is a bug;
-- these settings make sure even a bug logs no row values. They need a
-- superuser; skipped otherwise (then set them in postgresql.conf:
-- log_error_verbosity = terse, log_min_error_statement = panic,
-- log_parameter_max_length = 0, log_parameter_max_length_on_error = 0).
DO $$
BEGIN
    IF (SELECT rolsuper FROM pg_roles WHERE rolname = current_user) THEN
        ALTER ROLE ventderive_writer SET log_parameter_max_length = 0;
        ALTER ROLE ventderive_writer SET log_parameter_max_length_on_error = 0;
        ALTER ROLE ventderive_writer SET log_error_verbosity = 'terse';
        ALTER ROLE ventderive_writer SET log_min_error_statement = 'panic';
    END IF;
END
$$;

-- Grants on the migrated objects, when the schema exists already.
DO $$
BEGIN
    IF to_regprocedure('ventderive_apply_grants()') IS NOT NULL THEN
        PERFORM ventderive_apply_grants();
    END IF;
END
$$;
