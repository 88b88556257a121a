//! Shared by the tests that run the real `plimsoll-aggregator` binary.

use std::path::Path;
use std::process::{Command, Stdio};

pub const BIN: &str = env!("CARGO_BIN_EXE_plimsoll-aggregator");

/// Creates a one-signal study (3 parameters) with the real binary; returns
/// the enrollment code it printed.
pub fn create_study(db: &Path, dir: &Path, study: &str, rounds: u32, quorum: u32) -> String {
    let config = serde_json::json!({
        "study_id": study,
        "title": format!("test study {study}"),
        "signals": [{
            "signal": "resting_hr_bpm",
            "param_names": ["a", "b", "c"],
            "reference_center": 65.0,
            "reference_scale": 10.0,
            "initial": [0.0, 0.0, 0.0]
        }],
        "rounds": rounds,
        "training": { "optimizer": "sgd", "local_steps": 2, "learning_rate": 1.0, "window_days": 0, "hyperprior_weight_per_day": 0.0 },
        "fraction_per_round": 1.0,
        "min_quorum": quorum,
        "start_when_enrolled": quorum,
        "round_deadline_ms": 600000,
        "selection_seed": 3
    });
    let path = dir.join("study.json");
    std::fs::write(&path, config.to_string()).unwrap();
    let out = Command::new(BIN)
        .arg("--db")
        .arg(db)
        .arg("create-study")
        .arg(&path)
        .stderr(Stdio::null())
        .output()
        .unwrap();
    assert!(out.status.success());
    code_in(&String::from_utf8(out.stdout).unwrap())
}

/// The enrollment code printed at the end of a line that mentions one.
pub fn code_in(stdout: &str) -> String {
    stdout
        .lines()
        .find(|l| l.contains("enrollment code"))
        .and_then(|l| l.rsplit_once(": "))
        .map(|(_, code)| code.trim().to_owned())
        .unwrap_or_else(|| panic!("no enrollment code in `{stdout}`"))
}

/// Reads the first line `serve` prints (`aggregator listening on ADDR
/// (TLS|plaintext)`); returns the line and ADDR.
pub fn listening_line(child: &mut std::process::Child) -> (String, std::net::SocketAddr) {
    use std::io::{BufRead, BufReader};
    let mut line = String::new();
    BufReader::new(child.stdout.take().expect("stdout is piped"))
        .read_line(&mut line)
        .unwrap();
    let addr = line
        .strip_prefix("aggregator listening on ")
        .and_then(|rest| rest.split_whitespace().next())
        .and_then(|a| a.parse().ok())
        .unwrap_or_else(|| panic!("unexpected first line `{line}`"));
    (line, addr)
}
