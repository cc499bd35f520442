-- PostgreSQL twin of migrations/0012_chain_gain_uncertainty.sql
-- (same tables, columns, keys and indexes; checked by server/tests/store_schema.rs).
-- Differences: surrogate keys are identity columns, and every integer column is BIGINT (the
-- store reads them as i64).

-- The standard uncertainty of a chain calibration's gain at each frequency, in dB, as the
-- calibration states it (a certificate, a power-sensor budget). NULL where the table states none
-- (every version stored before this column, Touchstone cascades): V_pi's uncertainty budget then
-- needs the value from its caller.
ALTER TABLE chain_calibration_points ADD COLUMN gain_uncertainty_db DOUBLE PRECISION;
