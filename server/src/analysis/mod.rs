//! Pure measurement analysis: analyzer trace -> comb lines -> modulation index -> V_pi.
//!
//! No I/O, no clocks, no global state: every function takes typed values and returns a result with
//! its uncertainty, so the engine, the offline `analyze` command and the benchmarks share one code
//! path.
