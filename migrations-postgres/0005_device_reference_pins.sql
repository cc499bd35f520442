-- PostgreSQL twin of migrations/0005_device_reference_pins.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- A device's reference calibration: the completed run a lab pins so that V_pi lookups and the
-- device's plots use it whatever runs come later (a quick check must not replace it). At most one
-- per device; a device without a row has none, and lookups use the newest completed run that
-- covers the frequency asked for. Pinning and unpinning are written to the audit log in the same
-- transaction. Portable SQL (SQLite and PostgreSQL).
CREATE TABLE device_pins (
    device_id BIGINT PRIMARY KEY REFERENCES devices (id) ON DELETE CASCADE,
    run_id BIGINT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    pinned_by TEXT NOT NULL,
    pinned_at_unix_ms BIGINT NOT NULL,
    note TEXT NOT NULL
);
