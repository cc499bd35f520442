-- PostgreSQL twin of migrations/0006_run_instruments.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- Which instruments measured a run: the identities (IEEE 488.2 *IDN?) its bench's source and
-- analyzer gave when the run started (and again at every resumption, so a run resumed on a
-- replaced instrument lists both). A calibration read months later says what measured it.
-- Portable SQL (SQLite and PostgreSQL).
CREATE TABLE run_instruments (
    run_id BIGINT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    role TEXT NOT NULL CHECK (role IN ('source', 'analyzer')),
    instrument_id BIGINT NOT NULL REFERENCES instruments (id),
    PRIMARY KEY (run_id, role, instrument_id)
);
