-- PostgreSQL twin of migrations/0009_point_analyzer_sweeps.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- Analyzer sweeps each point cost: its own sweeps (averages) and, for the first point measured
-- after a frequency's laser search and reference trace, those sweeps too. Summed per frequency
-- and per run they say what the instrument time went on. NULL for points stored before this
-- column existed. Portable SQL (SQLite and PostgreSQL).
ALTER TABLE points ADD COLUMN analyzer_sweeps BIGINT;
