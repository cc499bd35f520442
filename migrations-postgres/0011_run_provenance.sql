-- PostgreSQL twin of migrations/0011_run_provenance.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- What a run was measured and judged with, beyond its instruments (0006, 0007): the software
-- version and the analysis method version that executed it (a run resumed by another version
-- lists both, "A then B"), the API token that submitted it (its name is `submitted_by`; names of
-- revoked tokens can be reused, the id cannot), and the safety limits in force when it was
-- queued: the daemon's hard ceiling at the modulator input and the highest level the proven plan
-- puts there. NULL for runs queued before this migration or by code that records none.
-- Portable SQL (SQLite and PostgreSQL).
ALTER TABLE runs ADD COLUMN software_version TEXT;
ALTER TABLE runs ADD COLUMN analysis_method TEXT;
ALTER TABLE runs ADD COLUMN submitted_by_token_id BIGINT REFERENCES api_tokens (id);
ALTER TABLE runs ADD COLUMN hard_limit_at_modulator_dbm DOUBLE PRECISION;
ALTER TABLE runs ADD COLUMN planned_max_at_modulator_dbm DOUBLE PRECISION;
