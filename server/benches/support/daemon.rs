//! What the benchmarks that measure the real daemon process share: a configuration with one
//! simulated bench on a free loopback port, starting `halfwave serve` from it (killed when
//! dropped), and reading the process's memory from `/proc`.

#![allow(dead_code)] // each benchmark uses only part of it

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};

/// The `halfwave` binary Cargo builds beside the benchmark.
pub fn halfwave() -> Command {
    Command::new(env!("CARGO_BIN_EXE_halfwave"))
}

/// Writes `halfwave.toml` in `dir`: a free loopback port, data under `dir/data`, one simulated
/// bench "sim" (seed 3, instrument times scaled by 0.02). Returns the file and the port.
pub fn simulated_config(dir: &Path) -> (PathBuf, u16) {
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let config = dir.join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n[bench.simulation]\nseed = 3\ntime_factor = 0.02\n",
            dir.join("data").display()
        ),
    )
    .unwrap();
    (config, port)
}

/// A running `halfwave serve`; killed when dropped, so an early stop leaves no process behind.
pub struct Daemon {
    child: Child,
}

impl Daemon {
    /// Starts `halfwave serve --config <config>` (log level warn) and returns once it printed
    /// that it listens; its further output is read and dropped.
    pub fn serve(config: &Path) -> Daemon {
        let mut child = halfwave()
            .args(["serve", "--config"])
            .arg(config)
            .env("HALFWAVE_LOG", "warn")
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let mut stdout = BufReader::new(child.stdout.take().unwrap());
        let daemon = Daemon { child };
        let mut line = String::new();
        stdout.read_line(&mut line).unwrap();
        assert!(line.contains("listening"), "{line}");
        std::thread::spawn(move || {
            let mut sink = String::new();
            while stdout.read_line(&mut sink).map(|n| n > 0).unwrap_or(false) {
                sink.clear();
            }
        });
        daemon
    }

    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// A field of the daemon's `/proc/<pid>/status` in MB (`VmRSS:`, `VmHWM:`).
    pub fn status_mb(&self, field: &str) -> f64 {
        status_mb(self.pid(), field)
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A field of `/proc/<pid>/status` in MB (the kernel reports kB); NaN if it cannot be read.
pub fn status_mb(pid: u32, field: &str) -> f64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    status
        .lines()
        .find(|l| l.starts_with(field))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|kb| kb.parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}
