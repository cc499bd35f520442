-- Analyzer sweeps each point cost: its own sweeps (averages) and, for the first point measured
-- after a frequency's laser search and reference trace, those sweeps too. Summed per frequency
-- and per run they say what the instrument time went on. NULL for points stored before this
-- column existed. Portable SQL (SQLite and PostgreSQL).
ALTER TABLE points ADD COLUMN analyzer_sweeps INTEGER;
