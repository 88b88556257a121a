//! Generation benchmark: 10,000 participants × 365 days × 6 signals from
//! `demo-data/pilot.toml`, written to a temporary folder. Prints wall time,
//! peak resident memory (VmHWM from /proc/self/status) and output size.
//! Targets: under 10 s and under 500 MB in release mode.
//!
//! ```text
//! cargo run --release -p plimsoll-device --example bench_simulate [-- SCENARIO.toml]
//! ```

use std::path::{Path, PathBuf};
use std::time::Instant;

use plimsoll_device::cohort::{Scenario, SimulateOptions, simulate_to_dir};

const PARTICIPANTS: usize = 10_000;
const DAYS: usize = 365;
const TARGET_SECONDS: f64 = 10.0;
const TARGET_MB: f64 = 500.0;

fn peak_resident_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

fn folder_size_mb(dir: &Path) -> f64 {
    std::fs::read_dir(dir)
        .map(|entries| {
            entries
                .filter_map(|e| e.ok()?.metadata().ok())
                .map(|m| m.len() as f64)
                .sum::<f64>()
        })
        .unwrap_or(0.0)
        / 1e6
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let scenario_path = std::env::args().nth(1).map_or_else(
        || PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/pilot.toml"),
        PathBuf::from,
    );
    let scenario = Scenario::from_path(&scenario_path)?;
    assert_eq!(
        scenario.signals().len(),
        6,
        "the benchmark expects a scenario with all six signals"
    );
    let out = std::env::temp_dir().join(format!("plimsoll-bench-simulate-{}", std::process::id()));
    let opts = SimulateOptions {
        seed: Some(1),
        participants: Some(PARTICIPANTS),
        days: Some(DAYS),
    };

    let started = Instant::now();
    let summary = simulate_to_dir(&scenario, &opts, &out, &mut |_, _| {})?;
    let seconds = started.elapsed().as_secs_f64();
    let peak_mb = peak_resident_mb().unwrap_or(f64::NAN);
    let size_mb = folder_size_mb(&out);
    std::fs::remove_dir_all(&out)?;

    let events: usize = summary.events_by_kind.values().sum();
    println!(
        "simulate {} participants x {} days x 6 signals ({}): {seconds:.2} s wall, peak RSS {peak_mb:.1} MB, output {size_mb:.0} MB, {events} events",
        summary.n_participants,
        summary.n_days,
        scenario_path.display()
    );
    println!(
        "time {:.2} of target ({TARGET_SECONDS} s), memory {:.2} of target ({TARGET_MB} MB)",
        seconds / TARGET_SECONDS,
        peak_mb / TARGET_MB
    );
    Ok(())
}
