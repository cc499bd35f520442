-- PostgreSQL twin of migrations/0003_point_trace_in_point_row.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- A point's trace moves into the point's own row, so committing a point is one INSERT statement
-- (atomic on its own) instead of a transaction of two: a quarter of the round trips to the
-- database thread on the engine's hot path. Listing points names its columns and never reads the
-- blob. Portable: ALTER TABLE ... ADD COLUMN, a correlated UPDATE and DROP TABLE are accepted by
-- SQLite and PostgreSQL alike.

ALTER TABLE points ADD COLUMN trace_point_count BIGINT;
ALTER TABLE points ADD COLUMN trace_encoded BYTEA;

UPDATE points SET
    trace_point_count = (SELECT t.point_count FROM point_traces t WHERE t.point_id = points.id),
    trace_encoded = (SELECT t.encoded FROM point_traces t WHERE t.point_id = points.id);

DROP TABLE point_traces;
