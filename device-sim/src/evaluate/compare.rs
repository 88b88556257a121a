//! `plimsoll evaluate --compare-aggregation`: the same cohort, the federated prior learned
//! once per aggregation setting (plain FedAvg, FedAvg with a sensor-aware prior, and the
//! fairness-aware rules of `plimsoll_server::aggregate`), each evaluated with the same
//! detector; a table of the federated method's overall sensitivity and its subgroup
//! disparities at the matched false-alarm levels, and the per-group false alarm episode
//! rates at the calibrated default.
//!
//! Every row is a separate federated run over loopback gRPC, so the comparison costs one
//! training per setting.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::Context;
use plimsoll_server::aggregate::AggregationRule;
use serde::Serialize;

use super::command::{PriorOptions, learn_prior};
use super::report::EvaluationReport;
use super::run::{EvaluationSettings, evaluate_cohort};
use super::sweep::ChanceSpread;
use crate::cohort::Cohort;

/// λ of the group-loss-ranked rule in the comparison (the multiplier is `1 + λ r_g/|g|`,
/// so λ of the order of a group's submissions per round moves weights by tens of per cent;
/// the rule caps λ where a weight would turn negative).
pub const COMPARISON_LAMBDAS: [f64; 2] = [5.0, 20.0];

/// q of q-FedAvg in the comparison (Li et al. 2020 report q from 0.1 to 15).
pub const COMPARISON_QS: [f64; 2] = [1.0, 5.0];

/// The settings compared: plain FedAvg; then, with the sensor-aware prior when a sensor
/// column is given, FedAvg, group-rank for each of [`COMPARISON_LAMBDAS`] (with a group
/// column) and q-FedAvg for each of [`COMPARISON_QS`].
pub fn comparison_settings(
    sensor_column: Option<&str>,
    group_column: Option<&str>,
) -> Vec<PriorOptions> {
    let sensor = sensor_column.map(str::to_owned);
    let group = group_column.map(str::to_owned);
    let with = |rule| PriorOptions {
        sensor_column: sensor.clone(),
        group_column: group.clone(),
        rule,
        dp_epsilon: None,
        secure_aggregation: false,
    };
    let mut out = vec![PriorOptions {
        group_column: group.clone(),
        ..PriorOptions::default()
    }];
    if sensor.is_some() {
        out.push(with(AggregationRule::Fedavg));
    }
    if group.is_some() {
        for lambda in COMPARISON_LAMBDAS {
            out.push(with(AggregationRule::GroupRank { lambda }));
        }
    }
    for q in COMPARISON_QS {
        out.push(with(AggregationRule::QFedavg { q }));
    }
    out
}

/// One row of the comparison: a setting at one matched level.
#[derive(Debug, Clone, Serialize)]
pub struct ComparisonRow {
    pub setting: String,
    /// False alarm episodes per participant-month (whole cohort).
    pub matched_level: f64,
    /// The federated method's sensitivity there.
    pub sensitivity: Option<f64>,
    /// One entry per group column.
    pub disparities: Vec<ColumnDisparity>,
}

/// One group column's disparity at a matched level.
#[derive(Debug, Clone, Serialize)]
pub struct ColumnDisparity {
    pub column: String,
    /// Highest minus lowest sensitivity across the column's levels.
    pub sensitivity_disparity: Option<f64>,
    /// Highest over lowest false alarm episode rate.
    pub false_alarm_ratio: Option<f64>,
    /// The spread chance alone gives at these event counts.
    pub by_chance: Option<ChanceSpread>,
}

/// One setting's figures at the calibrated default: per group column and level, the false
/// alarm episode rate.
#[derive(Debug, Clone, Serialize)]
pub struct CalibratedRow {
    pub setting: String,
    pub sensitivity: Option<f64>,
    /// (column, level, false alarm episodes per participant-month, sensitivity).
    pub groups: Vec<(String, String, Option<f64>, Option<f64>)>,
}

/// What the comparison wrote.
#[derive(Debug)]
pub struct Comparison {
    pub matched: Vec<ComparisonRow>,
    pub calibrated: Vec<CalibratedRow>,
    pub csv: PathBuf,
    pub json: PathBuf,
}

/// Runs every setting of [`comparison_settings`] on `cohort`, writing
/// `evaluation-aggregation.csv` and `evaluation-aggregation.json` in `out_dir`.
///
/// # Errors
/// A federated run or an evaluation fails, or a write fails.
pub async fn compare_aggregation(
    cohort: &Arc<Cohort>,
    cohort_name: &str,
    rounds: u32,
    settings: &EvaluationSettings,
    compared: &[PriorOptions],
    out_dir: &Path,
    progress: bool,
) -> anyhow::Result<Comparison> {
    let mut matched = Vec::new();
    let mut calibrated = Vec::new();
    for (i, g) in compared.iter().enumerate() {
        let label = g.label();
        if progress {
            eprintln!("[{}/{}] {label}", i + 1, compared.len());
        }
        let work = out_dir.join(format!("compare-{}", i + 1));
        let learned = learn_prior(cohort, rounds, false, g, &work, progress)
            .await
            .with_context(|| format!("learning the prior with {label}"))?;
        let mut s = settings.clone();
        s.prior_source = learned.source.clone();
        let report = evaluate_cohort(cohort, cohort_name, &learned.priors, &s, None)
            .with_context(|| format!("evaluating with {label}"))?;
        let (m, c) = rows(&report, &label);
        matched.extend(m);
        calibrated.push(c);
    }
    let csv = out_dir.join("evaluation-aggregation.csv");
    write_csv(&matched, &csv).with_context(|| format!("writing {}", csv.display()))?;
    let json = out_dir.join("evaluation-aggregation.json");
    let text = serde_json::to_string_pretty(&serde_json::json!({
        "matched": matched,
        "calibrated_default": calibrated,
        "caution": super::report::CAUTION,
    }))?;
    std::fs::write(&json, text + "\n").with_context(|| format!("writing {}", json.display()))?;
    Ok(Comparison {
        matched,
        calibrated,
        csv,
        json,
    })
}

/// The federated method's rows of one report.
fn rows(report: &EvaluationReport, setting: &str) -> (Vec<ComparisonRow>, CalibratedRow) {
    let Some(fed) = report.methods.iter().find(|m| m.method == "federated") else {
        return (
            Vec::new(),
            CalibratedRow {
                setting: setting.to_owned(),
                sensitivity: None,
                groups: Vec::new(),
            },
        );
    };
    let matched = fed
        .matched
        .iter()
        .map(|m| {
            let level = m.false_alarm_episodes_per_participant_month;
            ComparisonRow {
                setting: setting.to_owned(),
                matched_level: level,
                sensitivity: m.sensitivity,
                disparities: fed
                    .disparities
                    .iter()
                    .filter(|d| d.matched_level == level)
                    .map(|d| ColumnDisparity {
                        column: d.column.clone(),
                        sensitivity_disparity: d.sensitivity_disparity,
                        false_alarm_ratio: d.false_alarm_ratio,
                        by_chance: d.sensitivity_disparity_by_chance,
                    })
                    .collect(),
            }
        })
        .collect();
    let overall = fed
        .subgroups
        .iter()
        .find(|s| s.column == "all")
        .and_then(|s| s.metrics.sensitivity);
    let calibrated = CalibratedRow {
        setting: setting.to_owned(),
        sensitivity: overall,
        groups: fed
            .subgroups
            .iter()
            .filter(|s| s.column != "all")
            .map(|s| {
                (
                    s.column.clone(),
                    s.level.clone(),
                    s.metrics.false_alarm_episodes_per_participant_month,
                    s.metrics.sensitivity,
                )
            })
            .collect(),
    };
    (matched, calibrated)
}

fn fmt(v: Option<f64>, scale: f64, digits: usize) -> String {
    v.map_or_else(|| "-".to_owned(), |x| format!("{:.digits$}", scale * x))
}

fn write_csv(rows: &[ComparisonRow], path: &Path) -> anyhow::Result<()> {
    let mut f = std::io::BufWriter::new(std::fs::File::create(path)?);
    writeln!(
        f,
        "setting,matched_level,sensitivity,group_column,sensitivity_disparity,\
         sensitivity_disparity_by_chance_p95,sensitivity_disparity_p_value,false_alarm_ratio"
    )?;
    for r in rows {
        for ColumnDisparity {
            column,
            sensitivity_disparity: disparity,
            false_alarm_ratio: ratio,
            by_chance: chance,
        } in &r.disparities
        {
            writeln!(
                f,
                "\"{}\",{},{},{},{},{},{},{}",
                r.setting.replace('"', "\"\""),
                r.matched_level,
                fmt(r.sensitivity, 1.0, 4),
                column,
                fmt(*disparity, 1.0, 4),
                fmt(chance.map(|c| c.p95), 1.0, 4),
                fmt(chance.map(|c| c.p_value), 1.0, 4),
                fmt(*ratio, 1.0, 3)
            )?;
        }
    }
    f.flush()?;
    Ok(())
}

/// The comparison as a terminal table: per setting and matched level, overall sensitivity
/// and each group column's sensitivity disparity (points) and false alarm ratio; then per
/// setting the calibrated default's false alarm episode rate range per group column.
pub fn render_comparison(c: &Comparison) -> String {
    let mut out = String::new();
    let columns: Vec<String> = {
        let mut v: Vec<String> = c
            .matched
            .iter()
            .flat_map(|r| r.disparities.iter().map(|d| d.column.clone()))
            .collect();
        v.sort();
        v.dedup();
        v
    };
    out.push_str(&format!("{:<44} {:>6} {:>7}", "setting", "level", "sens %"));
    for col in &columns {
        out.push_str(&format!(" {:>28}", format!("{col} Δsens [chance]/FA×")));
    }
    out.push('\n');
    for r in &c.matched {
        out.push_str(&format!(
            "{:<44} {:>6} {:>7}",
            r.setting,
            r.matched_level,
            fmt(r.sensitivity, 100.0, 1)
        ));
        for col in &columns {
            let cell = r.disparities.iter().find(|d| &d.column == col).map_or_else(
                || "-".to_owned(),
                |d| {
                    let chance = d
                        .by_chance
                        .map_or_else(String::new, |c| format!(" [{:.1}]", 100.0 * c.p95));
                    format!(
                        "{}{chance} / {}",
                        fmt(d.sensitivity_disparity, 100.0, 1),
                        fmt(d.false_alarm_ratio, 1.0, 2)
                    )
                },
            );
            out.push_str(&format!(" {cell:>28}"));
        }
        out.push('\n');
    }
    out.push_str("\nAt the calibrated default (false alarm episodes per participant-month, lowest–highest level; ratio):\n");
    for r in &c.calibrated {
        out.push_str(&format!(
            "{:<44} sens {:>5}%",
            r.setting,
            fmt(r.sensitivity, 100.0, 1)
        ));
        for col in &columns {
            let rates: Vec<f64> = r
                .groups
                .iter()
                .filter(|g| &g.0 == col)
                .filter_map(|g| g.2)
                .collect();
            let lo = rates.iter().copied().fold(f64::INFINITY, f64::min);
            let hi = rates.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            if rates.is_empty() {
                continue;
            }
            out.push_str(&format!(
                "  {col} {lo:.2}–{hi:.2} ({})",
                if lo > 0.0 {
                    format!("{:.2}×", hi / lo)
                } else {
                    "-".to_owned()
                }
            ));
        }
        out.push('\n');
    }
    out
}
