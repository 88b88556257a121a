//! Bounded mutation fuzzing of the cohort CSV reader (a plain mutation loop,
//! no coverage guidance). Starts from small hand-written `daily.csv` files
//! (valid, CRLF, BOM with a quoted id and an unknown column), applies random byte-level and CSV-aware mutations (flip,
//! insert, delete, duplicate a line, truncate, inject quotes, BOMs, CRs,
//! NULs and invalid UTF-8), and checks on every input that the reader
//!
//! 1. never panics,
//! 2. with the quarantine policy either errors cleanly or returns rows and
//!    issues whose line numbers lie inside the file, and
//! 3. keeps every participant's dates sorted and unique.
//!
//! `cargo run --release -p plimsoll-device --example fuzz_reader -- [SECONDS] [SEED]`

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::time::{Duration, Instant};

use plimsoll_device::cohort::{BadRowPolicy, read_daily};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const SEEDS: [&str; 3] = [
    "participant,date,resting_hr_bpm,hrv_rmssd_ms,sleep_h,skin_temp_delta_c,steps,resp_rate_brpm\n\
p-001,2026-03-01,61.2,44.0,7.25,0.10,8042,14.2\n\
p-001,2026-03-02,60.8,,6.90,-0.05,10311,14.0\n\
p-002,2026-03-01,72.5,28.1,6.10,0.31,5120,16.3\n",
    "participant,date,steps\r\nx,2026-01-01,1\r\nx,2026-01-03,2\r\n",
    "\u{feff}participant,date,sleep_h,extra\n\"p,1\",2026-02-28,8.0,a\n",
];

fn mutate(base: &[u8], rng: &mut ChaCha8Rng) -> Vec<u8> {
    let mut v = base.to_vec();
    for _ in 0..rng.random_range(1..6) {
        let len = v.len().max(1);
        match rng.random_range(0..10) {
            0 => {
                let i = rng.random_range(0..len);
                if i < v.len() {
                    v[i] ^= 1 << rng.random_range(0..8);
                }
            }
            1 => {
                let i = rng.random_range(0..=v.len());
                const PIECES: [&[u8]; 12] = [
                    b",",
                    b"\"",
                    b"\n",
                    b"\r",
                    b"\0",
                    b"-",
                    b".",
                    b"e9",
                    b"NaN",
                    b"\xff\xfe",
                    "\u{feff}".as_bytes(),
                    b"9999-99-99",
                ];
                let bytes = PIECES[rng.random_range(0..PIECES.len())];
                v.splice(i..i, bytes.iter().copied());
            }
            2 => {
                if !v.is_empty() {
                    let a = rng.random_range(0..v.len());
                    let b = (a + rng.random_range(0..16)).min(v.len());
                    v.drain(a..b);
                }
            }
            3 => {
                // Duplicate a whole line.
                let text = v.clone();
                let lines: Vec<&[u8]> = text.split(|b| *b == b'\n').collect();
                let line = lines[rng.random_range(0..lines.len())];
                let mut out = text.clone();
                out.extend_from_slice(b"\n");
                out.extend_from_slice(line);
                v = out;
            }
            4 => {
                // Replace a number-looking byte with a digit.
                let i = rng.random_range(0..len);
                if i < v.len() && v[i].is_ascii_digit() {
                    v[i] = b'0' + rng.random_range(0..10);
                }
            }
            5 => v.truncate(rng.random_range(0..=v.len())),
            6 => v.extend(std::iter::repeat_n(b',', rng.random_range(1..4))),
            7 => {
                let i = rng.random_range(0..=v.len());
                v.splice(i..i, b"1e308".iter().copied());
            }
            8 => {
                v = v
                    .iter()
                    .flat_map(|b| {
                        if *b == b'\n' {
                            vec![b'\r', b'\n']
                        } else {
                            vec![*b]
                        }
                    })
                    .collect()
            }
            _ => {
                let i = rng.random_range(0..=v.len());
                let junk: Vec<u8> = (0..rng.random_range(1..8)).map(|_| rng.random()).collect();
                v.splice(i..i, junk);
            }
        }
    }
    v
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let seconds: u64 = args.get(1).and_then(|s| s.parse().ok()).unwrap_or(30);
    let seed: u64 = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(1);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("daily.csv");
    let deadline = Instant::now() + Duration::from_secs(seconds);
    let (mut runs, mut accepted, mut errors) = (0u64, 0u64, 0u64);
    std::panic::set_hook(Box::new(|_| {}));
    while Instant::now() < deadline {
        let base = SEEDS[rng.random_range(0..SEEDS.len())].as_bytes();
        let input = mutate(base, &mut rng);
        std::fs::write(&path, &input).expect("write input");
        // A lone `\r` ends a line too (it ends a CSV record), so count both bytes.
        let n_lines = input.split(|b| matches!(b, b'\n' | b'\r')).count() as u64;
        let outcome = catch_unwind(AssertUnwindSafe(|| {
            read_daily(&path, BadRowPolicy::Quarantine)
        }));
        runs += 1;
        match outcome {
            Err(_) => {
                let keep = dir.path().join(format!("panic-{runs}.csv"));
                std::fs::copy(&path, &keep).ok();
                let _ = std::panic::take_hook();
                eprintln!(
                    "PANIC on input #{runs}; input kept at {} ({:?})",
                    keep.display(),
                    String::from_utf8_lossy(&input)
                );
                std::process::exit(1);
            }
            Ok(Err(_)) => errors += 1,
            Ok(Ok((series, issues))) => {
                accepted += 1;
                for issue in &issues {
                    assert!(
                        issue.line >= 1 && issue.line <= n_lines + 1,
                        "issue line {} outside a {n_lines}-line file: {issue}",
                        issue.line
                    );
                }
                for s in &series {
                    assert!(
                        s.dates.windows(2).all(|w| w[0] < w[1]),
                        "dates of {} not sorted and unique",
                        s.participant
                    );
                    for column in s.values.values() {
                        assert_eq!(column.len(), s.dates.len());
                    }
                }
            }
        }
    }
    println!(
        "fuzz_reader: {runs} inputs in {seconds} s (seed {seed}): {accepted} read with quarantine, {errors} refused with an error, 0 panics"
    );
}
