//! `plimsoll evaluate` end to end on a small simulated cohort: the federated prior is learned
//! over loopback gRPC (a few rounds), the four methods are evaluated, and the CSV, JSON and SVG
//! are checked for shape, documented keys and plausible ranges; then the written `prior.json`
//! is reused on a folder holding only `daily.csv` (no participants, no events).

use std::path::{Path, PathBuf};

use plimsoll_device::cohort::{Scenario, SimulateOptions, simulate_to_dir};
use plimsoll_device::evaluate::command::{EvaluateOptions, EvaluationOutcome, run_evaluation};
use plimsoll_device::evaluate::run::EvaluationSettings;
use serde_json::Value;

const METHODS: [&str; 5] = [
    "federated",
    "local_only",
    "population",
    "rolling_z",
    "rhr_median_rule",
];
/// Methods with a predictive band (coverage and NLPD).
const BANDED: usize = 4;

/// Keys of one subgroup object in `evaluation.json` (docs/evaluation.md).
const SUBGROUP_KEYS: [&str; 13] = [
    "column",
    "level",
    "participants",
    "events",
    "events_detected",
    "sensitivity",
    "false_alarms_per_participant_month",
    "median_lead_from_start_days",
    "median_lead_from_onset_days",
    "coverage_95",
    "mean_nlpd",
    "days_outside_targets",
    "calibration_signal_days",
];

fn options(cohort: &Path, out: &Path, prior: Option<PathBuf>) -> EvaluateOptions {
    let mut settings = EvaluationSettings::new("");
    settings.threads = 2;
    EvaluateOptions {
        cohort_dir: cohort.to_owned(),
        out_dir: out.to_owned(),
        prior,
        rounds: 3,
        screened: true,
        settings,
        progress: false,
        bad_rows: plimsoll_device::cohort::BadRowPolicy::Quarantine,
        groups: Default::default(),
    }
}

fn json(outcome: &EvaluationOutcome) -> Value {
    serde_json::from_str(&std::fs::read_to_string(&outcome.json).unwrap()).unwrap()
}

fn in_unit_interval(v: &Value) -> bool {
    v.is_null() || v.as_f64().is_some_and(|x| (0.0..=1.0).contains(&x))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn evaluate_command_end_to_end() {
    let root = tempfile::tempdir().unwrap();
    let cohort = root.path().join("cohort");
    let scenario = Scenario::from_path(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/quick.toml"),
    )
    .unwrap();
    let sim = SimulateOptions {
        seed: Some(11),
        participants: Some(12),
        days: Some(100),
    };
    simulate_to_dir(&scenario, &sim, &cohort, &mut |_, _| {}).unwrap();

    let out = root.path().join("eval");
    let outcome = run_evaluation(&options(&cohort, &out, None)).await.unwrap();
    let report = json(&outcome);

    // Top level.
    assert_eq!(report["schema"], "plimsoll.evaluation.v2");
    assert_eq!(report["participants"], 12);
    assert_eq!(report["target_kinds"], serde_json::json!(["acute_illness"]));
    assert_eq!(report["settings"]["alarm_level"], "alert");
    assert!(
        report["settings"]["prior_source"]
            .as_str()
            .unwrap()
            .starts_with("federated: 3 rounds")
    );
    assert!(
        report["caution"]
            .as_str()
            .unwrap()
            .contains("not a diagnosis")
    );
    let levels = report["settings"]["matched_levels"].as_array().unwrap();
    assert_eq!(levels.len(), 4);

    // Methods, subgroups, curves.
    let methods = report["methods"].as_array().unwrap();
    let keys: Vec<&str> = methods
        .iter()
        .map(|m| m["method"].as_str().unwrap())
        .collect();
    assert_eq!(keys, METHODS);
    let cold: Vec<u64> = methods
        .iter()
        .map(|m| m["cold_start_observed_days"].as_u64().unwrap())
        .collect();
    assert_eq!(cold, [0, 28, 0, 14, 14]);
    let n_subgroups = methods[0]["subgroups"].as_array().unwrap().len();
    for (mi, m) in methods.iter().enumerate() {
        let subgroups = m["subgroups"].as_array().unwrap();
        assert_eq!(subgroups.len(), n_subgroups, "{}", m["method"]);
        assert_eq!(
            (&subgroups[0]["column"], &subgroups[0]["level"]),
            (&Value::from("all"), &Value::from("all"))
        );
        assert_eq!(subgroups[0]["participants"], 12);
        assert!(subgroups.iter().any(|g| g["column"] == "sex"));
        assert!(subgroups.iter().any(|g| g["column"] == "days_since_start"));
        for g in subgroups {
            let obj = g.as_object().unwrap();
            for key in SUBGROUP_KEYS {
                assert!(obj.contains_key(key), "{} lacks {key}", m["method"]);
            }
            assert!(in_unit_interval(&g["sensitivity"]), "{g}");
            assert!(in_unit_interval(&g["coverage_95"]), "{g}");
            assert!(g["events_detected"].as_u64() <= g["events"].as_u64());
            let fa = &g["false_alarms_per_participant_month"];
            assert!(fa.is_null() || fa.as_f64().unwrap() >= 0.0);
            let nlpd = &g["mean_nlpd"];
            assert!(nlpd.is_null() || nlpd.as_f64().unwrap().is_finite());
        }
        let all = &subgroups[0];
        assert!(
            all["events"].as_u64().unwrap() > 0,
            "the cohort has illnesses"
        );
        assert!(all["sensitivity"].is_number());
        // Each GP or baseline band covers most event-free days.
        if mi < BANDED {
            assert!(all["coverage_95"].as_f64().unwrap() > 0.5, "{all}");
        }
        let curve = m["curve"].as_array().unwrap();
        assert!(!curve.is_empty());
        for p in curve {
            assert!(in_unit_interval(&p["sensitivity"]));
            assert!(
                p["false_alarm_episodes_per_participant_month"]
                    .as_f64()
                    .unwrap()
                    >= 0.0
            );
        }
        assert_eq!(m["matched"].as_array().unwrap().len(), 4);
    }
    // Local-only scores nothing before its fitting days are over.
    let local_first = methods[1]["subgroups"]
        .as_array()
        .unwrap()
        .iter()
        .find(|g| g["column"] == "days_since_start" && g["level"] == "1-28")
        .unwrap();
    assert_eq!(local_first["calibration_signal_days"], 0);
    assert_eq!(local_first["participants"], 0);

    // CSV: header plus one row per method × subgroup.
    let csv = std::fs::read_to_string(&outcome.csv).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(
        &header[..3],
        ["method", "subgroup_column", "subgroup_level"]
    );
    for key in &SUBGROUP_KEYS[2..] {
        assert!(header.contains(key), "CSV lacks {key}");
    }
    let rows: Vec<&str> = lines.collect();
    assert_eq!(rows.len(), METHODS.len() * n_subgroups);
    for method in METHODS {
        assert_eq!(
            rows.iter()
                .filter(|r| r.starts_with(&format!("{method},")))
                .count(),
            n_subgroups
        );
    }

    // Disparities: for every group column of participants.csv, each method has one entry per
    // matched level with a threshold, its levels' figures and their spread (checked here
    // against the levels listed beside it); the CSV holds one row per column level.
    let group_columns: std::collections::BTreeSet<String> = methods[0]["subgroups"]
        .as_array()
        .unwrap()
        .iter()
        .map(|g| g["column"].as_str().unwrap().to_owned())
        .filter(|c| c != "all" && c != "days_since_start")
        .collect();
    assert!(
        !group_columns.is_empty(),
        "the simulated cohort has group columns"
    );
    let mut csv_rows = 0;
    for m in methods {
        for d in m["disparities"].as_array().unwrap() {
            assert!(group_columns.contains(d["column"].as_str().unwrap()), "{d}");
            let levels = d["levels"].as_array().unwrap();
            csv_rows += levels.len();
            let sens: Vec<f64> = levels
                .iter()
                .filter_map(|l| l["sensitivity"].as_f64())
                .collect();
            if sens.len() >= 2 {
                let spread = sens.iter().copied().fold(f64::MIN, f64::max)
                    - sens.iter().copied().fold(f64::MAX, f64::min);
                assert!((d["sensitivity_disparity"].as_f64().unwrap() - spread).abs() < 1e-12);
                // Chance's reference is a spread too, and the p-value a share of resamples.
                let chance = &d["sensitivity_disparity_by_chance"];
                assert!(
                    (0.0..=1.0).contains(&chance["p95"].as_f64().unwrap()),
                    "{d}"
                );
                assert!(
                    (0.0..=1.0).contains(&chance["p_value"].as_f64().unwrap()),
                    "{d}"
                );
            }
        }
        let columns: std::collections::BTreeSet<&str> = m["disparities"]
            .as_array()
            .unwrap()
            .iter()
            .map(|d| d["column"].as_str().unwrap())
            .collect();
        assert_eq!(
            columns.len(),
            group_columns.len(),
            "every group column, {}",
            m["method"]
        );
    }
    let disparity_csv = std::fs::read_to_string(&outcome.disparity_csv).unwrap();
    assert_eq!(
        disparity_csv.lines().count(),
        csv_rows + 1,
        "header plus one row per level"
    );

    // SVG: one polyline per method.
    let svg = std::fs::read_to_string(&outcome.svg).unwrap();
    assert!(svg.starts_with("<svg"));
    assert_eq!(svg.matches("<polyline").count(), METHODS.len());

    // The terminal table names every method.
    let table = plimsoll_device::evaluate::report::render_table(&outcome.report);
    for method in METHODS {
        assert!(table.contains(method));
    }

    // Reuse the written prior on a folder with only daily.csv: no events, so sensitivity is
    // null everywhere, false alarms are counted over all days, and only "all" and the periods
    // remain as subgroups.
    let prior = out.join("prior.json");
    assert!(prior.exists());
    let bare = root.path().join("bare");
    std::fs::create_dir_all(&bare).unwrap();
    std::fs::copy(cohort.join("daily.csv"), bare.join("daily.csv")).unwrap();
    let out2 = root.path().join("eval-bare");
    let bare_outcome = run_evaluation(&options(&bare, &out2, Some(prior.clone())))
        .await
        .unwrap();
    let report2 = json(&bare_outcome);
    assert!(
        report2["settings"]["prior_source"]
            .as_str()
            .unwrap()
            .starts_with("file ")
    );
    for m in report2["methods"].as_array().unwrap() {
        let subgroups = m["subgroups"].as_array().unwrap();
        assert!(
            subgroups
                .iter()
                .all(|g| g["column"] == "all" || g["column"] == "days_since_start")
        );
        let all = &subgroups[0];
        assert_eq!(all["events"], 0);
        assert!(all["sensitivity"].is_null());
        let fa = &all["false_alarms_per_participant_month"];
        assert!(fa.is_null() || fa.as_f64().unwrap() >= 0.0);
        for p in m["curve"].as_array().unwrap() {
            assert!(p["sensitivity"].is_null());
        }
    }
    let svg2 = std::fs::read_to_string(&bare_outcome.svg).unwrap();
    assert_eq!(svg2.matches("<polyline").count(), 0);
    assert!(svg2.contains("No target events"));
}

/// Subgroups end to end on a small fairness-stress cohort: a sensor-aware prior learned with
/// group-loss-ranked reweighting over the sensor model (models with 10 or more devices get
/// terms of their own, written to prior.json and read back), alarm thresholds calibrated per
/// age band (one note per level), and the aggregation comparison's table of settings.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sensor_aware_prior_fairness_rule_and_comparison() {
    use plimsoll_device::evaluate::command::PriorOptions;
    use plimsoll_device::evaluate::compare::{compare_aggregation, comparison_settings};
    use plimsoll_server::aggregate::AggregationRule;

    let root = tempfile::tempdir().unwrap();
    let cohort_dir = root.path().join("cohort");
    let scenario = Scenario::from_path(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-data/fairness-stress.toml"),
    )
    .unwrap();
    let sim = SimulateOptions {
        seed: Some(5),
        participants: Some(40),
        days: Some(60),
    };
    simulate_to_dir(&scenario, &sim, &cohort_dir, &mut |_, _| {}).unwrap();
    let out = root.path().join("eval");
    let mut opts = options(&cohort_dir, &out, None);
    opts.screened = false;
    opts.groups = PriorOptions {
        sensor_column: Some("device_model".into()),
        group_column: Some("device_model".into()),
        rule: AggregationRule::GroupRank { lambda: 5.0 },
        dp_epsilon: None,
        secure_aggregation: false,
    };
    opts.settings.calibrate_column = Some("age_band".into());
    let outcome = run_evaluation(&opts).await.unwrap();
    let report = json(&outcome);
    let source = report["settings"]["prior_source"].as_str().unwrap();
    assert!(
        source.contains("group_rank λ=5 over device_model, sensor-aware (device_model)"),
        "{source}"
    );
    let prior: Value =
        serde_json::from_str(&std::fs::read_to_string(&outcome.prior).unwrap()).unwrap();
    assert_eq!(prior["sensor_column"], "device_model");
    let cohort = plimsoll_device::cohort::read_cohort(
        &cohort_dir,
        plimsoll_device::cohort::BadRowPolicy::Abort,
    )
    .unwrap();
    let mut per_model = std::collections::BTreeMap::<&str, usize>::new();
    for g in cohort.groups.values() {
        *per_model.entry(g["device_model"].as_str()).or_default() += 1;
    }
    let with_terms: Vec<&str> = prior["sensor_priors"]
        .as_object()
        .map(|o| o.keys().map(String::as_str).collect())
        .unwrap_or_default();
    for (model, n) in &per_model {
        assert_eq!(
            with_terms.contains(model),
            *n >= 10,
            "{model}: {n} devices; models with terms of their own: {with_terms:?}"
        );
    }
    // Reading the file back keeps the sensor terms.
    let (back, _) = plimsoll_device::evaluate::prior_file::read_prior_file(&outcome.prior).unwrap();
    assert_eq!(back.by_sensor.len(), with_terms.len());
    let federated = report["methods"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["method"] == "federated")
        .unwrap();
    let notes: Vec<&str> = federated["notes"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(Value::as_str)
        .filter(|n| n.starts_with("calibrated per age_band"))
        .collect();
    let levels: std::collections::BTreeSet<&str> = cohort
        .groups
        .values()
        .filter_map(|g| g.get("age_band").map(String::as_str))
        .collect();
    assert_eq!(notes.len(), levels.len(), "{notes:?}");

    // The comparison: plain FedAvg and the sensor-aware FedAvg.
    let settings = comparison_settings(Some("device_model"), Some("device_model"));
    assert_eq!(settings[0].rule, AggregationRule::Fedavg);
    assert_eq!(settings[0].sensor_column, None);
    assert_eq!(settings.len(), 6, "{settings:?}");
    let mut eval_settings = EvaluationSettings::new("");
    eval_settings.threads = 2;
    let cmp_out = root.path().join("compare");
    std::fs::create_dir_all(&cmp_out).unwrap();
    let comparison = compare_aggregation(
        &std::sync::Arc::new(cohort),
        "fairness",
        3,
        &eval_settings,
        &settings[..2],
        &cmp_out,
        false,
    )
    .await
    .unwrap();
    assert_eq!(comparison.calibrated.len(), 2);
    assert_eq!(
        comparison.matched.len(),
        2 * 4,
        "two settings × four levels"
    );
    let csv = std::fs::read_to_string(&comparison.csv).unwrap();
    assert!(csv.starts_with(
        "setting,matched_level,sensitivity,group_column,sensitivity_disparity,\
         sensitivity_disparity_by_chance_p95,sensitivity_disparity_p_value,false_alarm_ratio\n"
    ));
    assert!(
        csv.contains("\"fedavg, sensor-aware (device_model)\""),
        "{csv}"
    );
}
