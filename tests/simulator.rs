//! Cohort simulator: reproducibility, the ground truth in `events.csv`,
//! each model component (checked by same-seed runs with the component off,
//! which share every random draw), and plausibility against published
//! values, each with its source and tolerance.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use plimsoll_device::cohort::{
    BadRowPolicy, Cohort, CohortError, Event, NaiveDate, PerSignal, Scenario, SimulateOptions,
    SimulationSummary, SleepCoupling, parse_date, read_cohort, simulate_to_dir,
};
use plimsoll_device::signal::Signal;

const FILES: [&str; 4] = [
    "daily.csv",
    "participants.csv",
    "events.csv",
    "scenario.toml",
];

fn demo(name: &str) -> Scenario {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../demo-data")
        .join(format!("{name}.toml"));
    Scenario::from_path(&path).unwrap_or_else(|e| panic!("{e}"))
}

/// A clean base: the quick scenario's population and device models with
/// no events, artifacts or missing data, at the given size.
fn clean(participants: usize, days: usize) -> Scenario {
    let mut s = demo("quick");
    s.participants = participants;
    s.days = days;
    s.illness.clear();
    s.stressor.clear();
    s.artifacts = Default::default();
    s.missing = Default::default();
    s
}

fn simulate(scenario: &Scenario, seed: u64) -> (tempfile::TempDir, SimulationSummary) {
    let dir = tempfile::tempdir().expect("tempdir");
    let opts = SimulateOptions {
        seed: Some(seed),
        ..Default::default()
    };
    let summary = simulate_to_dir(scenario, &opts, dir.path(), &mut |_, _| {}).expect("simulate");
    (dir, summary)
}

/// Reads with `Abort`: the reader must accept everything the simulator writes.
fn read(dir: &Path) -> Cohort {
    let cohort = read_cohort(dir, BadRowPolicy::Abort)
        .unwrap_or_else(|e| panic!("reader refused simulator output: {e}"));
    assert!(cohort.issues.is_empty(), "{:?}", cohort.issues);
    cohort
}

fn mean(xs: &[f64]) -> f64 {
    xs.iter().sum::<f64>() / xs.len() as f64
}

fn sd(xs: &[f64]) -> f64 {
    let m = mean(xs);
    (xs.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (xs.len() - 1) as f64).sqrt()
}

fn median(xs: &[f64]) -> f64 {
    let mut v = xs.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    }
}

fn fraction(xs: &[f64], keep: impl Fn(f64) -> bool) -> f64 {
    xs.iter().filter(|x| keep(**x)).count() as f64 / xs.len() as f64
}

/// (participant, day index) -> value of one signal.
fn cells(cohort: &Cohort, signal: Signal, origin: NaiveDate) -> BTreeMap<(String, i64), f64> {
    let mut out = BTreeMap::new();
    for p in &cohort.participants {
        let (days, values) = p.observations(signal, origin);
        for (d, v) in days.into_iter().zip(values) {
            out.insert((p.participant.clone(), d as i64), v);
        }
    }
    out
}

fn day_of(origin: NaiveDate, date: NaiveDate) -> i64 {
    (date - origin).num_days()
}

/// Per-participant mean of a signal's observed values.
fn participant_means(cohort: &Cohort, signal: Signal, origin: NaiveDate) -> Vec<f64> {
    cohort
        .participants
        .iter()
        .map(|p| p.observations(signal, origin).1)
        .filter(|v| !v.is_empty())
        .map(|v| mean(&v))
        .collect()
}

#[test]
fn identical_bytes_for_identical_scenario_and_seed() {
    let scenario = demo("quick");
    let mut progress = Vec::new();
    let a = tempfile::tempdir().expect("tempdir");
    let opts = SimulateOptions {
        seed: Some(11),
        ..Default::default()
    };
    simulate_to_dir(&scenario, &opts, a.path(), &mut |done, total| {
        progress.push((done, total))
    })
    .expect("simulate");
    assert_eq!(progress.len(), scenario.participants);
    assert_eq!(
        progress.last(),
        Some(&(scenario.participants, scenario.participants))
    );
    let (b, _) = simulate(&scenario, 11);
    for file in FILES {
        let (x, y) = (
            std::fs::read(a.path().join(file)).expect("a"),
            std::fs::read(b.path().join(file)).expect("b"),
        );
        assert!(!x.is_empty(), "{file} written");
        assert!(x == y, "{file} differs between two runs with the same seed");
    }
    let (c, _) = simulate(&scenario, 12);
    let daily = |d: &Path| std::fs::read(d.join("daily.csv")).expect("daily");
    assert_ne!(
        daily(a.path()),
        daily(c.path()),
        "another seed gives another cohort"
    );
}

#[test]
fn written_scenario_reproduces_the_cohort() {
    let dir = tempfile::tempdir().expect("tempdir");
    let opts = SimulateOptions {
        seed: Some(99),
        participants: Some(9),
        days: Some(45),
    };
    let summary =
        simulate_to_dir(&demo("quick"), &opts, dir.path(), &mut |_, _| {}).expect("simulate");
    let written =
        Scenario::from_path(&dir.path().join("scenario.toml")).expect("written scenario parses");
    assert_eq!(
        (written.seed, written.participants, written.days),
        (Some(99), 9, 45)
    );
    assert_eq!(summary.seed, 99);
    let again = tempfile::tempdir().expect("tempdir");
    simulate_to_dir(
        &written,
        &SimulateOptions::default(),
        again.path(),
        &mut |_, _| {},
    )
    .expect("simulate");
    for file in FILES {
        assert!(
            std::fs::read(dir.path().join(file)).expect("a")
                == std::fs::read(again.path().join(file)).expect("b"),
            "{file}: re-simulating the written scenario must give the same bytes"
        );
    }
    // Without any seed, one is drawn and reported.
    let mut unseeded = demo("quick");
    unseeded.seed = None;
    unseeded.participants = 2;
    let third = tempfile::tempdir().expect("tempdir");
    let summary = simulate_to_dir(
        &unseeded,
        &SimulateOptions::default(),
        third.path(),
        &mut |_, _| {},
    )
    .expect("simulate");
    let written = Scenario::from_path(&third.path().join("scenario.toml")).expect("parses");
    assert_eq!(written.seed, Some(summary.seed));
}

#[test]
fn summary_matches_the_files() {
    let scenario = demo("pilot");
    let (dir, summary) = simulate(&scenario, 5);
    let cohort = read(dir.path());
    assert_eq!((summary.n_participants, summary.n_days), (500, 180));
    assert_eq!(cohort.participants.len() + count_without_rows(&cohort), 500);
    for (column, counts) in &summary.participants_per_group {
        assert_eq!(counts.values().sum::<usize>(), 500, "{column}");
        for (value, n) in counts {
            let in_file = cohort
                .groups
                .values()
                .filter(|g| g.get(column) == Some(value))
                .count();
            assert_eq!(in_file, *n, "{column}={value}");
        }
    }
    let mut by_kind: BTreeMap<String, usize> = BTreeMap::new();
    for e in &cohort.events {
        *by_kind.entry(e.kind.clone()).or_default() += 1;
    }
    assert_eq!(by_kind, summary.events_by_kind);
    for kind in [
        "acute_illness",
        "training_block",
        "timezone_shift",
        "late_night_alcohol",
        "artifact_spike",
        "artifact_stuck",
    ] {
        assert!(
            by_kind.get(kind).copied().unwrap_or(0) > 0,
            "pilot has {kind} events"
        );
    }
    for signal in Signal::ALL {
        let observed: usize = cohort
            .participants
            .iter()
            .map(|p| p.observations(signal, scenario.start_date).1.len())
            .sum();
        let expected = 1.0 - observed as f64 / (500.0 * 180.0);
        assert!(
            (summary.missing_rate[&signal] - expected).abs() < 1e-12,
            "{signal}"
        );
        // 3 % missing days + ~1.5 % in gaps + 2 % alone + dropout ≈ 10–15 %.
        assert!(
            (0.05..0.25).contains(&expected),
            "{signal} missing rate {expected}"
        );
    }
}

fn count_without_rows(cohort: &Cohort) -> usize {
    let with_rows: BTreeSet<&str> = cohort
        .participants
        .iter()
        .map(|p| p.participant.as_str())
        .collect();
    cohort
        .groups
        .keys()
        .filter(|p| !with_rows.contains(p.as_str()))
        .count()
}

#[test]
fn plausibility_against_published_values() {
    let scenario = demo("pilot");
    let (dir, _) = simulate(&scenario, scenario.seed.expect("pilot has a seed"));
    let cohort = read(dir.path());
    let origin = scenario.start_date;

    // Resting HR: 65.5 ± 7.7 bpm (mean ± SD of participants) in a large
    // wearable cohort, Quer et al., PLoS One 2020. Tolerance: mean 62–69, SD 6–10.
    let rhr = participant_means(&cohort, Signal::RestingHr, origin);
    let (m, s) = (mean(&rhr), sd(&rhr));
    assert!((62.0..=69.0).contains(&m), "mean resting HR {m:.1}");
    assert!((6.0..=10.0).contains(&s), "SD of resting HR means {s:.1}");
    // Clinical normal range 60–100 bpm (AHA; common practice): most people
    // are inside, but with mean 65.5 and SD 7.7 about a quarter sit below 60,
    // so "most" is checked as at least 65 % inside and 98 % within 40–100.
    assert!(fraction(&rhr, |x| (60.0..=100.0).contains(&x)) >= 0.65);
    assert!(fraction(&rhr, |x| (40.0..=100.0).contains(&x)) >= 0.98);

    // RMSSD: short-term norms of Nunan et al., PACE 2010, from memory (not
    // re-checked against the paper): mean about 42 ms; study medians range
    // 19–75 ms. Tolerance: median of participant medians 35–50 ms, at least
    // 80 % of participant medians within 19–75 ms.
    let hrv: Vec<f64> = cohort
        .participants
        .iter()
        .map(|p| p.observations(Signal::HrvRmssd, origin).1)
        .filter(|v| !v.is_empty())
        .map(|v| median(&v))
        .collect();
    let hrv_median = median(&hrv);
    assert!(
        (35.0..=50.0).contains(&hrv_median),
        "median RMSSD {hrv_median:.1}"
    );
    assert!(fraction(&hrv, |x| (19.0..=75.0).contains(&x)) >= 0.8);

    // Sleep: adults should sleep 7 h or more (Watson et al., J Clin Sleep
    // Med 2015); measured main-sleep means of adult cohorts sit near 7 h
    // (from memory). Tolerance: cohort mean 6.5–7.5 h, 90 % of participant
    // means within 5.5–8.5 h.
    let sleep = participant_means(&cohort, Signal::Sleep, origin);
    assert!(
        (6.5..=7.5).contains(&mean(&sleep)),
        "mean sleep {:.2}",
        mean(&sleep)
    );
    assert!(fraction(&sleep, |x| (5.5..=8.5).contains(&x)) >= 0.9);

    // Steps: healthy adults take roughly 4,000–18,000 steps/day (Tudor-Locke
    // et al., IJBNPA 2011). Tolerance: 85 % of participant means and 75 % of
    // participant-days inside that range.
    let steps = participant_means(&cohort, Signal::Steps, origin);
    assert!(fraction(&steps, |x| (4000.0..=18000.0).contains(&x)) >= 0.85);
    let all_steps: Vec<f64> = cohort
        .participants
        .iter()
        .flat_map(|p| p.observations(Signal::Steps, origin).1)
        .collect();
    assert!(fraction(&all_steps, |x| (4000.0..=18000.0).contains(&x)) >= 0.75);

    // Respiratory rate at night: 12–20 breaths/min is the adult normal range
    // (common practice). Tolerance: 95 % of participant means inside.
    let resp = participant_means(&cohort, Signal::RespRate, origin);
    assert!(fraction(&resp, |x| (12.0..=20.0).contains(&x)) >= 0.95);
}

#[test]
fn weekly_rhythm_shows_in_sleep_and_steps() {
    let scenario = clean(200, 84);
    let (dir, _) = simulate(&scenario, 3);
    let cohort = read(dir.path());
    let monday = parse_date("2024-01-01").expect("a Monday");
    let weekend_split = |signal: Signal| {
        let (mut weekend, mut weekday) = (Vec::new(), Vec::new());
        for p in &cohort.participants {
            let (days, values) = p.observations(signal, monday);
            for (d, v) in days.into_iter().zip(values) {
                if (d as i64).rem_euclid(7) >= 5 {
                    weekend.push(v)
                } else {
                    weekday.push(v)
                }
            }
        }
        (mean(&weekend), mean(&weekday))
    };
    // Configured in quick.toml: sleep +0.4 h and steps −12 % on Saturdays and Sundays.
    let (we, wd) = weekend_split(Signal::Sleep);
    assert!(
        (we - wd - 0.4).abs() < 0.1,
        "weekend sleep gain {:.2} h",
        we - wd
    );
    let (we, wd) = weekend_split(Signal::Steps);
    assert!(
        (we / wd - 0.88).abs() < 0.04,
        "weekend steps ratio {:.3}",
        we / wd
    );
}

/// Illness windows of known shape; returns (peak − pre-event baseline) per
/// illness for each signal, the baseline being the mean of the 14 days
/// before the start.
fn illness_effects(
    cohort: &Cohort,
    origin: NaiveDate,
    peak_after_onset: i64,
) -> BTreeMap<Signal, Vec<f64>> {
    let mut out: BTreeMap<Signal, Vec<f64>> = BTreeMap::new();
    for signal in Signal::ALL {
        let values = cells(cohort, signal, origin);
        let log = matches!(signal, Signal::HrvRmssd | Signal::Steps);
        for e in cohort.events.iter().filter(|e| e.kind == "acute_illness") {
            let start = day_of(origin, e.start);
            if start < 14 {
                continue;
            }
            let peak =
                day_of(origin, e.symptom_onset.expect("illness has an onset")) + peak_after_onset;
            let t = |v: f64| if log { v.ln() } else { v };
            let baseline: Vec<f64> = (start - 14..start)
                .filter_map(|d| values.get(&(e.participant.clone(), d)).copied().map(t))
                .collect();
            if let (Some(at_peak), false) = (
                values.get(&(e.participant.clone(), peak)),
                baseline.is_empty(),
            ) {
                out.entry(signal)
                    .or_default()
                    .push(t(*at_peak) - mean(&baseline));
            }
        }
    }
    out
}

#[test]
fn illness_effects_are_recovered_from_generated_data() {
    let mut scenario = clean(200, 180);
    scenario.sleep_coupling = SleepCoupling::default();
    let mut illness = demo("pilot").illness.remove(0);
    illness.rate_per_year = 3.0;
    illness.presymptomatic_days = [2, 2];
    illness.peak_after_onset_days = [1, 1];
    illness.recovery_days = [5, 5];
    illness.fever_c_sd = 0.25;
    scenario.illness = vec![illness.clone()];
    let (dir, _) = simulate(&scenario, 8);
    let cohort = read(dir.path());

    for e in &cohort.events {
        let onset = e.symptom_onset.expect("onset");
        assert_eq!((onset - e.start).num_days(), 2, "presymptomatic phase");
        assert_eq!(
            (e.end - e.start).num_days(),
            2 + 1 + 5,
            "window = presymptomatic + peak delay + recovery"
        );
    }
    let effects = illness_effects(&cohort, scenario.start_date, 1);
    let n = effects[&Signal::RestingHr].len();
    assert!(n >= 150, "enough illnesses to average: {n}");
    // Configured: resting HR +8.5 bpm per °C of fever (Karjalainen &
    // Viitasalo 1986) at a mean peak fever of 1.0 °C. Tolerance ±1 bpm
    // (per-illness SD ≈ 4 bpm, so the standard error is ≈ 0.3 bpm).
    let rhr = mean(&effects[&Signal::RestingHr]);
    assert!(
        (rhr - 8.5).abs() < 1.0,
        "resting HR rise at peak {rhr:.2} bpm"
    );
    // Skin temperature +0.6 °C per °C of fever: tolerance ±0.1 °C.
    let temp = mean(&effects[&Signal::SkinTempDelta]);
    assert!(
        (temp - 0.6).abs() < 0.1,
        "skin temperature rise {temp:.2} °C"
    );
    // RMSSD −25 % and steps −45 % at peak, compared as mean log ratios.
    // With severity s = fever/1.0 °C (SD 0.25), E[ln(1 − a·s)] ≈ ln(1 − a)
    // − a²·0.25²/(2(1 − a)²): −0.004 for RMSSD, −0.021 for steps. Tolerance
    // ±0.07 and ±0.1 (about 3 standard errors of 200 illnesses).
    let hrv = mean(&effects[&Signal::HrvRmssd]);
    assert!(
        (hrv - (0.75_f64.ln() - 0.004)).abs() < 0.07,
        "RMSSD log ratio {hrv:.3}"
    );
    let steps = mean(&effects[&Signal::Steps]);
    assert!(
        (steps - (0.55_f64.ln() - 0.021)).abs() < 0.1,
        "steps log ratio {steps:.3}"
    );
    // Respiratory rate +1.5 breaths/min and sleep +0.8 h: tolerance ±0.3.
    let resp = mean(&effects[&Signal::RespRate]);
    assert!((resp - 1.5).abs() < 0.3, "respiratory rate rise {resp:.2}");
    let sleep = mean(&effects[&Signal::Sleep]);
    assert!((sleep - 0.8).abs() < 0.3, "sleep gain {sleep:.2} h");
}

/// Cells that differ between two same-seed runs: (participant, day).
fn changed_cells(a: &Cohort, b: &Cohort, origin: NaiveDate) -> BTreeSet<(String, i64)> {
    let mut out = BTreeSet::new();
    for signal in Signal::ALL {
        let (x, y) = (cells(a, signal, origin), cells(b, signal, origin));
        assert_eq!(x.len(), y.len(), "same missingness in same-seed runs");
        for (key, v) in &x {
            if (v - y[key]).abs() > 1e-9 {
                out.insert(key.clone());
            }
        }
    }
    out
}

/// Same scenario with every illness and stressor effect set to zero: the
/// random draws are the same, only the effects are gone.
fn without_effects(scenario: &Scenario) -> Scenario {
    let mut s = scenario.clone();
    for ill in &mut s.illness {
        ill.resting_hr_bpm_per_fever_c = 0.0;
        ill.skin_temp_c_per_fever_c = 0.0;
        ill.effect_at_peak = PerSignal::default();
    }
    for st in &mut s.stressor {
        st.peak_effect = PerSignal::default();
    }
    s
}

#[test]
fn event_windows_are_exactly_the_days_signals_change() {
    for coupled in [false, true] {
        let mut scenario = clean(150, 150);
        let pilot = demo("pilot");
        scenario.illness = pilot.illness.clone();
        scenario.stressor = pilot.stressor.clone();
        if !coupled {
            scenario.sleep_coupling = SleepCoupling::default();
        }
        let origin = scenario.start_date;
        let (with_dir, _) = simulate(&scenario, 21);
        let (without_dir, _) = simulate(&without_effects(&scenario), 21);
        let (with, without) = (read(with_dir.path()), read(without_dir.path()));
        let changed = changed_cells(&with, &without, origin);
        let events: Vec<&Event> = with.events.iter().collect();
        assert!(events.len() > 100, "{} events", events.len());

        let mut windows: BTreeMap<&str, Vec<(i64, i64)>> = BTreeMap::new();
        for e in &events {
            windows
                .entry(e.participant.as_str())
                .or_default()
                .push((day_of(origin, e.start), day_of(origin, e.end)));
            if let Some(onset) = e.symptom_onset {
                assert!(e.start <= onset && onset <= e.end, "{e:?}");
            }
        }
        for w in windows.values() {
            for pair in w.windows(2) {
                assert!(pair[0].1 < pair[1].0, "event windows overlap: {pair:?}");
            }
        }
        for (participant, day) in &changed {
            let inside = windows
                .get(participant.as_str())
                .is_some_and(|w| w.iter().any(|(s, e)| (s..=e).contains(&day)));
            assert!(
                inside,
                "coupled={coupled}: {participant} day {day} changed outside every event window"
            );
        }
        let shows = |p: &str, day: i64| changed.contains(&(p.to_owned(), day));
        let starts = events
            .iter()
            .filter(|e| shows(&e.participant, day_of(origin, e.start)))
            .count();
        assert!(
            starts as f64 >= 0.95 * events.len() as f64,
            "coupled={coupled}: {starts}/{} starts show a change",
            events.len()
        );
        // Without coupling the last day always carries the event's own
        // effect; with coupling the window may end with the night after a
        // changed sleep, which changes RMSSD only if that sleep was short.
        let ends = events
            .iter()
            .filter(|e| {
                let end = day_of(origin, e.end);
                shows(&e.participant, end) || (coupled && shows(&e.participant, end - 1))
            })
            .count();
        assert!(
            ends as f64 >= 0.95 * events.len() as f64,
            "coupled={coupled}: {ends}/{} ends show a change",
            events.len()
        );
    }
}

#[test]
fn short_nights_raise_resting_hr_and_lower_next_night_hrv() {
    let coupled = clean(150, 120);
    let mut uncoupled = coupled.clone();
    uncoupled.sleep_coupling = SleepCoupling::default();
    let origin = coupled.start_date;
    let (a_dir, _) = simulate(&coupled, 4);
    let (b_dir, _) = simulate(&uncoupled, 4);
    let (a, b) = (read(a_dir.path()), read(b_dir.path()));
    let (rhr_a, rhr_b) = (
        cells(&a, Signal::RestingHr, origin),
        cells(&b, Signal::RestingHr, origin),
    );
    let (hrv_a, hrv_b) = (
        cells(&a, Signal::HrvRmssd, origin),
        cells(&b, Signal::HrvRmssd, origin),
    );
    let sleep = cells(&a, Signal::Sleep, origin);
    let (mut short_rhr, mut long_rhr, mut short_hrv) = (Vec::new(), Vec::new(), Vec::new());
    for p in &a.participants {
        let own = median(&p.observations(Signal::Sleep, origin).1);
        for ((id, day), hours) in
            sleep.range((p.participant.clone(), i64::MIN)..=(p.participant.clone(), i64::MAX))
        {
            let rhr_diff = rhr_a[&(id.clone(), *day)] - rhr_b[&(id.clone(), *day)];
            assert!(rhr_diff > -0.11, "coupling never lowers resting HR");
            if *hours < own - 2.0 {
                short_rhr.push(rhr_diff);
                if let (Some(x), Some(y)) = (
                    hrv_a.get(&(id.clone(), day + 1)),
                    hrv_b.get(&(id.clone(), day + 1)),
                ) {
                    short_hrv.push((x / y).ln());
                }
            } else if *hours > own + 1.0 {
                long_rhr.push(rhr_diff);
            }
        }
    }
    // Configured in quick.toml: +1 bpm and −4 % RMSSD per hour below one's
    // own baseline. A night 2 h short of the median is about 2 h short of
    // the baseline (measurement noise 0.25 h).
    assert!(
        mean(&short_rhr) > 1.5,
        "resting HR after short nights +{:.2}",
        mean(&short_rhr)
    );
    assert!(
        mean(&long_rhr) < 0.1,
        "long nights change nothing: {:.2}",
        mean(&long_rhr)
    );
    assert!(
        mean(&short_hrv) < -0.06,
        "next-night RMSSD log ratio {:.3}",
        mean(&short_hrv)
    );
}

#[test]
fn luteal_phase_raises_skin_temperature_of_cycling_participants() {
    let with = clean(120, 120);
    let mut without = with.clone();
    without
        .menstrual_cycle
        .as_mut()
        .expect("quick has cycles")
        .luteal_effect = PerSignal::default();
    let origin = with.start_date;
    let (a_dir, _) = simulate(&with, 6);
    let (b_dir, _) = simulate(&without, 6);
    let (a, b) = (read(a_dir.path()), read(b_dir.path()));
    let (ta, tb) = (
        cells(&a, Signal::SkinTempDelta, origin),
        cells(&b, Signal::SkinTempDelta, origin),
    );
    let mut cycling = 0;
    let mut females = 0;
    let mut mean_rise = Vec::new();
    for p in &a.participants {
        let diffs: Vec<f64> = ta
            .range((p.participant.clone(), i64::MIN)..=(p.participant.clone(), i64::MAX))
            .map(|(key, v)| v - tb[key])
            .collect();
        let max = diffs.iter().copied().fold(f64::MIN, f64::max);
        let sex = a.groups[&p.participant]["sex"].as_str();
        if sex == "male" {
            assert!(
                max.abs() < 1e-9,
                "{}: no cycle effect for male participants",
                p.participant
            );
            continue;
        }
        females += 1;
        if max > 0.01 {
            cycling += 1;
            // Full luteal rise configured at +0.33 °C (the size reported by
            // Shilaih et al., Biosci Rep 2018); ±0.01 °C for rounding.
            assert!(
                (max - 0.33).abs() <= 0.011,
                "{}: luteal rise {max:.3}",
                p.participant
            );
            mean_rise.push(mean(&diffs));
        }
    }
    assert!(
        cycling as f64 >= 0.5 * females as f64,
        "{cycling} of {females} female participants cycle"
    );
    // About 14 of 28.5 days are luteal, minus the ramp: ≈ 0.15 °C on average.
    let rise = mean(&mean_rise);
    assert!(
        (0.12..=0.19).contains(&rise),
        "mean rise over all days {rise:.3}"
    );
}

#[test]
fn missing_days_cells_gaps_and_dropout() {
    let mut scenario = clean(150, 200);
    scenario.missing.day_probability = 0.1;
    scenario.missing.single_signal_probability = 0.05;
    let (dir, summary) = simulate(&scenario, 2);
    let cohort = read(dir.path());
    let rows: usize = cohort.participants.iter().map(|p| p.dates.len()).sum();
    let present = rows as f64 / (150.0 * 200.0);
    assert!((present - 0.9).abs() < 0.01, "days present {present:.3}");
    for signal in Signal::ALL {
        // 1 − 0.9 × 0.95 = 0.145 missing
        assert!(
            (summary.missing_rate[&signal] - 0.145).abs() < 0.01,
            "{signal}: {}",
            summary.missing_rate[&signal]
        );
    }
    for p in &cohort.participants {
        for i in 0..p.dates.len() {
            assert!(
                p.values.values().any(|c| c[i].is_some()),
                "a row with no value is written as an absent day"
            );
        }
    }

    let mut scenario = clean(100, 200);
    scenario.missing.gap_rate_per_year = 6.0;
    scenario.missing.gap_days = [6, 6];
    scenario.missing.dropout_probability = 1.0;
    let (dir, _) = simulate(&scenario, 2);
    let cohort = read(dir.path());
    let origin = scenario.start_date;
    let mut with_gap = 0;
    let mut dropped = 0;
    for p in &cohort.participants {
        let days: Vec<i64> = p.dates.iter().map(|d| day_of(origin, *d)).collect();
        if days.windows(2).any(|w| w[1] - w[0] > 6) {
            with_gap += 1;
        }
        let last = *days.last().expect("rows");
        assert!(last >= 200 / 10 - 1, "dropout not before the first tenth");
        if last < 199 {
            dropped += 1;
        }
    }
    assert!(with_gap >= 60, "{with_gap} of 100 have a 6-day gap");
    assert!(
        dropped >= 95,
        "{dropped} of 100 dropped out before the last day"
    );
}

#[test]
fn artifacts_are_flagged_in_events() {
    let mut scenario = clean(100, 120);
    scenario.artifacts.spike_probability = 0.005;
    scenario.artifacts.spike_size_day_sd = [8.0, 10.0];
    scenario.artifacts.stuck_rate_per_year = 6.0;
    scenario.artifacts.stuck_days = [3, 3];
    let (dir, _) = simulate(&scenario, 13);
    let cohort = read(dir.path());
    let origin = scenario.start_date;
    let by_id: BTreeMap<&str, usize> = cohort
        .participants
        .iter()
        .enumerate()
        .map(|(i, p)| (p.participant.as_str(), i))
        .collect();
    let (mut spikes, mut spikes_seen, mut stuck, mut stuck_seen) = (0, 0, 0, 0);
    for e in &cohort.events {
        let p = &cohort.participants[by_id[e.participant.as_str()]];
        let at = |d: i64| p.dates.iter().position(|x| day_of(origin, *x) == d);
        let (start, end) = (day_of(origin, e.start), day_of(origin, e.end));
        match e.kind.as_str() {
            "artifact_spike" => {
                spikes += 1;
                assert_eq!(start, end);
                let row = at(start).expect("spike day is written");
                let far = Signal::ALL.iter().any(|s| {
                    let model = scenario.signals.get(*s).expect("model");
                    let column = &p.values[s];
                    let own: Vec<f64> = column.iter().flatten().copied().collect();
                    let log = matches!(s, Signal::HrvRmssd | Signal::Steps);
                    let t = |v: f64| if log { v.max(1.0).ln() } else { v };
                    column[row].is_some_and(|v| (t(v) - t(median(&own))).abs() > 4.0 * model.day_sd)
                });
                spikes_seen += usize::from(far);
            }
            "artifact_stuck" => {
                stuck += 1;
                let rows: Option<Vec<usize>> = (start - 1..=end).map(at).collect();
                let Some(rows) = rows else { continue };
                let repeated = Signal::ALL.iter().any(|s| {
                    let column = &p.values[s];
                    rows.iter().all(|r| column[*r] == column[rows[0]])
                });
                stuck_seen += usize::from(repeated);
            }
            other => panic!("unexpected event kind {other}"),
        }
    }
    assert!(
        spikes > 100 && stuck > 50,
        "{spikes} spikes, {stuck} stuck runs"
    );
    assert!(
        spikes_seen as f64 >= 0.95 * spikes as f64,
        "{spikes_seen}/{spikes} spikes stand out by > 4 day SD"
    );
    assert_eq!(
        stuck_seen, stuck,
        "every stuck run repeats the value written the day before it"
    );
}

#[test]
fn extreme_settings_are_clamped_into_the_plausible_range() {
    let mut scenario = clean(40, 60);
    scenario.artifacts.spike_probability = 0.2;
    scenario.artifacts.spike_size_day_sd = [60.0, 80.0];
    let (dir, _) = simulate(&scenario, 1);
    let cohort = read(dir.path());
    let mut at_bounds = 0;
    for p in &cohort.participants {
        for (signal, column) in &p.values {
            let (low, high) = signal.plausible_range();
            for v in column.iter().flatten() {
                assert!((low..=high).contains(v));
                at_bounds += usize::from(*v == low || *v == high);
            }
        }
    }
    assert!(
        at_bounds > 100,
        "clamping exercised: {at_bounds} values at a bound"
    );
}

#[test]
fn optical_error_is_larger_in_the_flagged_subgroup() {
    let scenario = demo("fairness-stress");
    let (dir, _) = simulate(&scenario, scenario.seed.expect("seed"));
    let cohort = read(dir.path());
    let origin = scenario.start_date;
    // Per subgroup: mean SD of day-to-day RHR changes; missing share of an
    // optical (RMSSD) and a non-optical (steps) signal among written rows.
    let mut stats: BTreeMap<&str, (Vec<f64>, f64, f64, f64)> = BTreeMap::new();
    for p in &cohort.participants {
        let group = cohort.groups[&p.participant]["skin_type"].as_str();
        let entry = stats.entry(group).or_insert((Vec::new(), 0.0, 0.0, 0.0));
        let (days, hr) = p.observations(Signal::RestingHr, origin);
        let steps: Vec<f64> = days
            .windows(2)
            .zip(hr.windows(2))
            .filter(|(d, _)| d[1] - d[0] == 1.0)
            .map(|(_, h)| h[1] - h[0])
            .collect();
        if steps.len() > 10 {
            entry.0.push(sd(&steps));
        }
        let count_missing = |s: Signal| p.values[&s].iter().filter(|v| v.is_none()).count() as f64;
        entry.1 += count_missing(Signal::HrvRmssd);
        entry.2 += count_missing(Signal::Steps);
        entry.3 += p.dates.len() as f64;
    }
    let (minority, majority) = (&stats["V-VI"], &stats["I-IV"]);
    assert!(
        minority.0.len() >= 10,
        "enough minority participants: {}",
        minority.0.len()
    );
    let ratio = mean(&minority.0) / mean(&majority.0);
    assert!(ratio > 1.3, "day-to-day resting HR spread ratio {ratio:.2}");
    let optical_gap = minority.1 / minority.3 - majority.1 / majority.3;
    let other_gap = minority.2 / minority.3 - majority.2 / majority.3;
    assert!(
        (0.05..0.12).contains(&optical_gap),
        "extra optical missingness {optical_gap:.3} (configured 0.08)"
    );
    assert!(
        other_gap.abs() < 0.02,
        "non-optical missingness unaffected: {other_gap:.3}"
    );
}

#[test]
fn demo_scenarios_parse_with_the_documented_sizes() {
    let sizes: Vec<(String, usize, usize, usize)> = ["quick", "pilot", "fairness-stress"]
        .into_iter()
        .map(|name| {
            let s = demo(name);
            (s.name.clone(), s.participants, s.days, s.signals().len())
        })
        .collect();
    assert_eq!(sizes[0], ("quick".to_owned(), 24, 120, 6));
    assert_eq!(sizes[1], ("pilot".to_owned(), 500, 180, 6));
    assert_eq!(sizes[2].0, "fairness-stress");
    let fairness = demo("fairness-stress");
    assert!(
        fairness
            .groups
            .iter()
            .flat_map(|g| &g.levels)
            .any(|l| l.optical_noise_scale > 1.0 && l.share < 0.5)
    );
}

#[test]
fn bad_scenarios_are_refused_with_the_field_named() {
    let text = std::fs::read_to_string(
        PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml"),
    )
    .expect("read");
    let typo = text.replacen("day_sd = 2.5", "day_sdd = 2.5", 1);
    let err = Scenario::from_toml_str(&typo).expect_err("unknown field");
    assert!(
        matches!(err, CohortError::Scenario { .. }) && err.to_string().contains("day_sdd"),
        "{err}"
    );
    let bad = text.replacen("ar1 = 0.6", "ar1 = 1.5", 1);
    let err = Scenario::from_toml_str(&bad).expect_err("ar1 out of range");
    assert!(
        err.to_string().contains("signals.resting_hr_bpm.ar1"),
        "{err}"
    );
    let bad = text.replacen(
        "value = \"18-34\"\nshare = 0.35",
        "value = \"18-34\"\nshare = -1",
        1,
    );
    assert!(
        Scenario::from_toml_str(&bad)
            .expect_err("negative share")
            .to_string()
            .contains("share")
    );
    let err =
        Scenario::from_path(Path::new("/nonexistent/scenario.toml")).expect_err("missing file");
    assert!(matches!(err, CohortError::Io { .. }));
    let dir = tempfile::tempdir().expect("tempdir");
    let opts = SimulateOptions {
        participants: Some(0),
        ..Default::default()
    };
    assert!(
        simulate_to_dir(&demo("quick"), &opts, dir.path(), &mut |_, _| {}).is_err(),
        "zero participants refused"
    );
}
