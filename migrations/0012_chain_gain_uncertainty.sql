-- The standard uncertainty of a chain calibration's gain at each frequency, in dB, as the
-- calibration states it (a certificate, a power-sensor budget). NULL where the table states none
-- (every version stored before this column, Touchstone cascades): V_pi's uncertainty budget then
-- needs the value from its caller.
ALTER TABLE chain_calibration_points ADD COLUMN gain_uncertainty_db DOUBLE PRECISION;
