-- PostgreSQL twin of migrations/0007_run_instrument_connection.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- How each instrument was driven for a run: the choices its driver made at connect (how the
-- analyzer's frequency axis is read and in which unit, the trace format, where the source's
-- limits came from), as a JSON array of {"item", "value"}. A record read later says not only
-- what measured it but how the axis was obtained. Portable SQL (SQLite and PostgreSQL).
ALTER TABLE run_instruments ADD COLUMN connection TEXT NOT NULL DEFAULT '[]';
