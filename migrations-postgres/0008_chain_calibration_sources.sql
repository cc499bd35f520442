-- PostgreSQL twin of migrations/0008_chain_calibration_sources.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- The files a chain calibration version was computed from (Touchstone files cascaded by
-- `halfwave chain import`): in cascade order from the generator, each a two-port or the
-- modulator's one-port load, with the file's name and the SHA-256 of its bytes (64 lowercase hex
-- digits), so a stored gain table can be traced to the exact measurements. A version uploaded as a
-- plain table has none. Portable SQL (SQLite and PostgreSQL).
CREATE TABLE chain_calibration_sources (
    chain_calibration_id BIGINT NOT NULL REFERENCES chain_calibrations (id) ON DELETE CASCADE,
    position BIGINT NOT NULL CHECK (position >= 0),
    role TEXT NOT NULL CHECK (role IN ('two_port', 'load')),
    file_name TEXT NOT NULL,
    sha256 TEXT NOT NULL CHECK (length(sha256) = 64),
    PRIMARY KEY (chain_calibration_id, position)
);
