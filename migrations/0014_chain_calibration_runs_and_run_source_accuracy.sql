-- Chain calibration runs: the engine drives the RF source through the drive chain into a power
-- sensor and stores the result as a new version of a named chain calibration (0008, 0012). A
-- run's row keeps its request, state, cause, the version it produced and the per-frequency
-- readings and uncertainty budget (JSON document).
-- Also: the generator level accuracy (+/- dB) in force when a measurement run was submitted, so
-- a later change of the bench's configuration does not change an old run's V_pi budget. NULL for
-- runs submitted before this migration or on a bench that states none.
-- Portable SQL (SQLite and PostgreSQL; in PostgreSQL write the key as
-- BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY).
CREATE TABLE chain_calibration_runs (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    bench_name TEXT NOT NULL,
    request TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('queued', 'running', 'completed', 'failed', 'cancelled')),
    cause TEXT,
    submitted_by TEXT NOT NULL,
    created_at_unix_ms BIGINT NOT NULL,
    finished_at_unix_ms BIGINT,
    chain_calibration_id BIGINT REFERENCES chain_calibrations (id),
    result TEXT
);
ALTER TABLE runs ADD COLUMN source_level_accuracy_db DOUBLE PRECISION;
