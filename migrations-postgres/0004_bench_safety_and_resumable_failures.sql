-- PostgreSQL twin of migrations/0004_bench_safety_and_resumable_failures.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- The RF safety state of each bench, kept across restarts: a bench whose source output could not
-- be confirmed off, or that was confirmed off after such a fault and waits for an operator's
-- acknowledgement, must still be flagged (and hold its queue) after the daemon restarts. A bench
-- without a row is clear. Portable SQL (SQLite and PostgreSQL).
CREATE TABLE bench_safety (
    bench_name TEXT PRIMARY KEY,
    state TEXT NOT NULL CHECK (state IN ('output_unconfirmed', 'awaiting_acknowledgement')),
    cause TEXT NOT NULL,
    since_unix_ms BIGINT NOT NULL,
    confirmed_off_at_unix_ms BIGINT,
    updated_at_unix_ms BIGINT NOT NULL
);

-- A run that failed on a link fault with its points intact may be resumed like an interrupted one.
ALTER TABLE runs ADD COLUMN resumable BOOLEAN NOT NULL DEFAULT FALSE;
