-- Halfwave store: the first schema.
--
-- Portable on purpose: every type and statement here is accepted by both SQLite and PostgreSQL,
-- with one exception, the surrogate keys. `id INTEGER PRIMARY KEY` makes SQLite assign the rowid;
-- PostgreSQL needs `id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY` instead (see the store
-- section of DEVELOPERS.md).
-- Types: TEXT, BIGINT, DOUBLE PRECISION and BYTEA. SQLite gives BYTEA numeric affinity, which stores
-- a bound blob unchanged, so the same word works in both.
-- Times are BIGINT milliseconds since the Unix epoch (UTC), named `*_unix_ms`.
-- JSON is kept as TEXT (the store never looks inside it).

-- Modulators under calibration, one row per serial number.
CREATE TABLE devices (
    id INTEGER PRIMARY KEY,
    serial TEXT NOT NULL UNIQUE,
    model TEXT NOT NULL,
    rf_input_limit_dbm DOUBLE PRECISION NOT NULL,
    wavelength_nm DOUBLE PRECISION NOT NULL,
    created_at_unix_ms BIGINT NOT NULL,
    updated_at_unix_ms BIGINT NOT NULL
);

-- Every instrument identity (IEEE 488.2 *IDN? fields) seen at a resource. A firmware change is a
-- new row, so the history of what measured what is kept.
CREATE TABLE instruments (
    id INTEGER PRIMARY KEY,
    manufacturer TEXT NOT NULL,
    model TEXT NOT NULL,
    serial TEXT NOT NULL,
    firmware TEXT NOT NULL,
    resource TEXT NOT NULL,
    first_seen_unix_ms BIGINT NOT NULL,
    last_seen_unix_ms BIGINT NOT NULL,
    UNIQUE (manufacturer, model, serial, firmware, resource)
);

-- Drive-chain calibrations: versioned, never edited in place. A new upload under the same name
-- gets the next version.
CREATE TABLE chain_calibrations (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    version BIGINT NOT NULL CHECK (version >= 1),
    created_at_unix_ms BIGINT NOT NULL,
    created_by TEXT NOT NULL,
    UNIQUE (name, version)
);

-- The net gain of the chain from generator to modulator at each frequency
-- (level at modulator = generator level + gain_db; a loss is a negative gain).
CREATE TABLE chain_calibration_points (
    chain_calibration_id BIGINT NOT NULL REFERENCES chain_calibrations (id) ON DELETE CASCADE,
    frequency_hz DOUBLE PRECISION NOT NULL,
    gain_db DOUBLE PRECISION NOT NULL,
    PRIMARY KEY (chain_calibration_id, frequency_hz)
);

CREATE TABLE runs (
    id INTEGER PRIMARY KEY,
    plan_json TEXT NOT NULL,
    device_id BIGINT NOT NULL REFERENCES devices (id),
    bench_name TEXT NOT NULL,
    chain_calibration_id BIGINT NOT NULL REFERENCES chain_calibrations (id),
    state TEXT NOT NULL CHECK (state IN ('queued', 'running', 'completed', 'failed', 'cancelled', 'interrupted')),
    submitted_by TEXT NOT NULL,
    created_at_unix_ms BIGINT NOT NULL,
    started_at_unix_ms BIGINT,
    finished_at_unix_ms BIGINT,
    cause TEXT
);

CREATE INDEX runs_by_device_and_time ON runs (device_id, created_at_unix_ms);
CREATE INDEX runs_by_state ON runs (state);
CREATE INDEX runs_by_time ON runs (created_at_unix_ms);

-- One measured point of a run's frequency x level grid. The unique key is what makes a resumed run
-- unable to store a point twice.
CREATE TABLE points (
    id INTEGER PRIMARY KEY,
    run_id BIGINT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    frequency_index BIGINT NOT NULL CHECK (frequency_index >= 0),
    level_index BIGINT NOT NULL CHECK (level_index >= 0),
    frequency_hz DOUBLE PRECISION NOT NULL,
    generator_level_dbm DOUBLE PRECISION NOT NULL,
    level_at_modulator_dbm DOUBLE PRECISION NOT NULL,
    v_peak_volts DOUBLE PRECISION NOT NULL,
    modulation_index DOUBLE PRECISION,
    modulation_index_uncertainty DOUBLE PRECISION,
    asymmetry_db DOUBLE PRECISION,
    line_table_json TEXT NOT NULL,
    analysis_json TEXT NOT NULL,
    measured_at_unix_ms BIGINT NOT NULL,
    UNIQUE (run_id, frequency_index, level_index)
);

-- The analyzer trace of a point, compressed (format in server/src/store/trace_codec.rs).
CREATE TABLE point_traces (
    point_id BIGINT PRIMARY KEY REFERENCES points (id) ON DELETE CASCADE,
    point_count BIGINT NOT NULL,
    encoded BYTEA NOT NULL
);

-- Optional RF-off reference traces, one per run frequency.
CREATE TABLE reference_traces (
    id INTEGER PRIMARY KEY,
    run_id BIGINT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    frequency_index BIGINT NOT NULL CHECK (frequency_index >= 0),
    frequency_hz DOUBLE PRECISION NOT NULL,
    measured_at_unix_ms BIGINT NOT NULL,
    point_count BIGINT NOT NULL,
    encoded BYTEA NOT NULL,
    UNIQUE (run_id, frequency_index)
);

-- V_pi at one frequency of a run, from the fit over its drive levels.
CREATE TABLE frequency_results (
    id INTEGER PRIMARY KEY,
    run_id BIGINT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    frequency_index BIGINT NOT NULL CHECK (frequency_index >= 0),
    frequency_hz DOUBLE PRECISION NOT NULL,
    v_pi_volts DOUBLE PRECISION NOT NULL,
    v_pi_uncertainty_volts DOUBLE PRECISION NOT NULL,
    excluded_points_json TEXT NOT NULL,
    fit_json TEXT NOT NULL,
    computed_at_unix_ms BIGINT NOT NULL,
    UNIQUE (run_id, frequency_index)
);

CREATE INDEX frequency_results_by_frequency ON frequency_results (run_id, frequency_hz);

-- Who did what, when. Append-only.
CREATE TABLE audit_log (
    id INTEGER PRIMARY KEY,
    at_unix_ms BIGINT NOT NULL,
    actor TEXT NOT NULL,
    action TEXT NOT NULL,
    subject TEXT NOT NULL,
    detail TEXT NOT NULL
);

CREATE INDEX audit_log_by_time ON audit_log (at_unix_ms);
