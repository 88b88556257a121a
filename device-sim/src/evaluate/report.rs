//! The evaluation report: a terminal table, a CSV, a JSON with stable keys,
//! and an SVG plot of sensitivity against false alarms per method as the
//! thresholds vary.

use std::fmt::Write as _;
use std::path::Path;

use serde::Serialize;

use super::metrics::{Metrics, Subgroup};
pub use super::sweep::{CurvePoint, MatchedPoint};
use crate::detect::DetectConfig;
use crate::detect::calibration::Calibrated;
use crate::flags::FlagLevel;

/// JSON schema identifier; bump when a key changes meaning.
pub const SCHEMA: &str = "plimsoll.evaluation.v2";

/// One subgroup's metrics.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SubgroupMetrics {
    /// Group column from participants.csv, or "all".
    pub column: String,
    /// Level of that column, or "all".
    pub level: String,
    #[serde(flatten)]
    pub metrics: Metrics,
}

/// Everything measured for one method.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodSummary {
    /// Short stable key: `federated`, `local_only`, `population`, `rolling_z`.
    pub method: String,
    pub description: String,
    /// Observed days of a signal before the method scores or flags it.
    pub cold_start_observed_days: usize,
    /// Facts about the run worth knowing (e.g. local fits that failed).
    pub notes: Vec<String>,
    /// Metrics at the calibrated thresholds, "all" first, then each subgroup.
    pub subgroups: Vec<SubgroupMetrics>,
    /// Threshold sweep, ordered by threshold.
    pub curve: Vec<CurvePoint>,
    /// Sensitivity at matched false alarm episode rates (`settings.matched_levels`).
    pub matched: Vec<MatchedPoint>,
    /// Per group column and matched level: each level's figures at the whole cohort's
    /// threshold and their disparity (max − min).
    pub disparities: Vec<crate::evaluate::sweep::GroupDisparity>,
    /// Area under sensitivity against false alarm episodes per participant-month, 0 to 1,
    /// divided by 1 (see `docs/evaluation.md`).
    pub partial_auc_to_1: Option<f64>,
    /// The Alert threshold calibrated from the summed episode histograms.
    pub alert_threshold: Calibrated,
    /// The Watch threshold (budget × `watch_budget_factor`).
    pub watch_threshold: Calibrated,
    /// Episode rate per participant-month at the Alert threshold on the calibration data
    /// (every episode, target events included: what the study would see).
    pub calibration_rate_at_alert: f64,
}

/// The whole report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EvaluationReport {
    pub schema: String,
    pub cohort: String,
    pub participants: usize,
    /// Event kinds counted as detection targets (others are not targets;
    /// alarms during them count as false alarms).
    pub target_kinds: Vec<String>,
    /// Row-level problems the reader quarantined (see the command's output).
    pub input_issues: usize,
    /// Every problem the reader reported (quarantined rows and header
    /// remarks), in file then line order, at most [`MAX_LISTED_ISSUES`].
    pub issues: Vec<ReportedIssue>,
    /// Problems beyond [`MAX_LISTED_ISSUES`], left out of `issues` (the
    /// quarantine files under `quarantine/` hold every bad row).
    pub issues_not_listed: usize,
    pub settings: ReportSettings,
    /// Per signal, the pooled per-day objective (NLML per observed day, nats) of the shared
    /// prior on this cohort's training series (`training::pooled_objective`; lower fits
    /// better). Filled when the prior was learned in this run.
    #[serde(skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub prior_objective: std::collections::BTreeMap<String, f64>,
    pub methods: Vec<MethodSummary>,
    pub caution: String,
}

/// Most input problems listed in `evaluation.json`.
pub const MAX_LISTED_ISSUES: usize = 1000;

/// One input problem as listed in `evaluation.json`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportedIssue {
    /// File name within the cohort folder, e.g. `daily.csv`.
    pub file: String,
    /// 1-based physical line (the header is line 1).
    pub line: u64,
    /// 1-based column number, when the problem is one cell.
    pub column: Option<usize>,
    /// That column's header name.
    pub column_name: Option<String>,
    pub reason: String,
    /// True when the row was quarantined (false: a header remark, e.g. an
    /// unknown column that was ignored).
    pub quarantined: bool,
}

impl ReportedIssue {
    pub fn from_issue(issue: &crate::cohort::InputIssue) -> ReportedIssue {
        ReportedIssue {
            file: issue.file.file_name().map_or_else(
                || issue.file.display().to_string(),
                |n| n.to_string_lossy().into_owned(),
            ),
            line: issue.line,
            column: issue.column.as_ref().map(|c| c.0),
            column_name: issue.column.as_ref().map(|c| c.1.clone()),
            reason: issue.reason.clone(),
            quarantined: issue.is_row_error(),
        }
    }
}

/// How the evaluation was run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportSettings {
    /// Lowest level that counts as an alarm (`alert` or `watch`).
    pub alarm_level: FlagLevel,
    /// The Alert budget the calibrated thresholds come from.
    pub budget_alert_episodes_per_participant_month: f64,
    /// Watch thresholds are calibrated to this many times the budget.
    pub watch_budget_factor: f64,
    /// Detector settings shared by every method.
    pub detect: DetectConfig,
    /// Pseudo-days shrinking the learned correlation towards the identity.
    pub correlation_shrink_days: f64,
    /// Where the shared prior of `federated` and `population` came from.
    pub prior_source: String,
    /// Observed days per signal that `local_only` fits its hyperparameters on.
    pub local_fit_days: usize,
    /// `rolling_z`: most recent conditioned values in the baseline.
    pub rolling_window_values: usize,
    /// `rolling_z`: fewest conditioned values before it scores.
    pub rolling_min_values: usize,
    /// `rolling_z`: SD floor in standardised units.
    pub rolling_sd_floor: f64,
    /// False alarm episode rates of the matched comparison.
    pub matched_levels: Vec<f64>,
}

/// The caution printed with every evaluation output: the one caution of
/// [`plimsoll_proto::caution`].
pub const CAUTION: &str = plimsoll_proto::caution::TEXT;

/// `text` broken at spaces into lines of at most `width` characters (a word
/// longer than that gets its own line).
fn wrap_words(text: &str, width: usize) -> Vec<String> {
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > width {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

impl MethodSummary {
    pub fn new(
        method: &str,
        description: &str,
        cold_start_observed_days: usize,
        subgroups: Vec<(Subgroup, Metrics)>,
        curve: Vec<CurvePoint>,
    ) -> Self {
        MethodSummary {
            method: method.into(),
            description: description.into(),
            cold_start_observed_days,
            notes: Vec::new(),
            subgroups: subgroups
                .into_iter()
                .map(|((column, level), metrics)| SubgroupMetrics {
                    column,
                    level,
                    metrics,
                })
                .collect(),
            curve,
            matched: Vec::new(),
            disparities: Vec::new(),
            partial_auc_to_1: None,
            alert_threshold: Calibrated {
                threshold: f64::NAN,
                rate: 0.0,
                capped: false,
            },
            watch_threshold: Calibrated {
                threshold: f64::NAN,
                rate: 0.0,
                capped: false,
            },
            calibration_rate_at_alert: 0.0,
        }
    }
}

fn opt(v: Option<f64>, decimals: usize) -> String {
    v.map_or_else(|| "–".into(), |x| format!("{x:.decimals$}"))
}

fn pct(v: Option<f64>) -> String {
    v.map_or_else(|| "–".into(), |x| format!("{:.1}%", 100.0 * x))
}

/// The terminal table: one block for the whole cohort, then one per subgroup column.
pub fn render_table(report: &EvaluationReport) -> String {
    let mut s = String::new();
    let header = format!(
        "{:<15} {:<16} {:>6} {:>12} {:>8} {:>9} {:>10} {:>10} {:>9} {:>7}\n",
        "method",
        "subgroup",
        "events",
        "sensitivity",
        "FAep/mo",
        "FAd/mo",
        "lead start",
        "lead onset",
        "cover 95",
        "NLPD"
    );
    let mut groups: Vec<(String, String)> = Vec::new();
    for m in &report.methods {
        for g in &m.subgroups {
            let key = (g.column.clone(), g.level.clone());
            if !groups.contains(&key) {
                groups.push(key);
            }
        }
    }
    let mut last_column = String::new();
    for (column, level) in &groups {
        if *column != last_column {
            let _ = writeln!(
                s,
                "{}",
                if column == "all" {
                    "Whole cohort".to_string()
                } else {
                    format!("By {column}")
                }
            );
            s.push_str(&header);
            last_column = column.clone();
        }
        for m in &report.methods {
            if let Some(g) = m
                .subgroups
                .iter()
                .find(|g| &g.column == column && &g.level == level)
            {
                let x = &g.metrics;
                let _ = writeln!(
                    s,
                    "{:<15} {:<16} {:>6} {:>12} {:>8} {:>9} {:>10} {:>10} {:>9} {:>7}",
                    m.method,
                    level,
                    x.events,
                    pct(x.sensitivity),
                    opt(x.false_alarm_episodes_per_participant_month, 2),
                    opt(x.false_alarms_per_participant_month, 2),
                    opt(x.median_lead_from_start_days, 1),
                    opt(x.median_lead_from_onset_days, 1),
                    pct(x.coverage_95),
                    opt(x.mean_nlpd, 3),
                );
            }
        }
        s.push('\n');
    }
    s.push_str(&render_matched(report));
    s.push_str(&render_disparities(report));
    s.push_str("Rows above: at each method's calibrated Alert threshold. FAep/mo: false alarm episodes per\n");
    s.push_str("participant-month (episodes with no alarm day in a target event); FAd/mo: false alarm-days. Lead: median days from\n");
    s.push_str("event start / symptom onset to the first alarm (negative = before). cover 95: share of event-free\n");
    s.push_str("days inside the 95% prospective band. NLPD: mean negative log predictive density (standardised units).\n");
    s.push_str(CAUTION);
    s.push('\n');
    s
}

/// The matched table: each method's sensitivity and median lead at each matched false alarm
/// episode rate, the partial AUC and the calibrated thresholds.
pub fn render_matched(report: &EvaluationReport) -> String {
    let mut s = String::from(
        "Matched false alarm episodes per participant-month (sensitivity / median lead from start, days)\n",
    );
    let _ = write!(s, "{:<15}", "method");
    for l in &report.settings.matched_levels {
        let _ = write!(s, " {:>14}", format!("at {l}"));
    }
    let _ = writeln!(s, " {:>8} {:>9} {:>9}", "pAUC≤1", "Alert ≥", "Watch ≥");
    for m in &report.methods {
        let _ = write!(s, "{:<15}", m.method);
        for p in &m.matched {
            let cell = match p.sensitivity {
                Some(x) => format!(
                    "{:.1}% / {}",
                    100.0 * x,
                    opt(p.median_lead_from_start_days, 0)
                ),
                None => "–".into(),
            };
            let _ = write!(s, " {cell:>14}");
        }
        let _ = writeln!(
            s,
            " {:>8} {:>9.2} {:>9.2}",
            opt(m.partial_auc_to_1, 3),
            m.alert_threshold.threshold,
            m.watch_threshold.threshold
        );
    }
    s.push('\n');
    s
}

/// The disparity table: per group column, each method's spread of sensitivity and of false
/// alarm episodes across the column's levels at each matched level.
pub fn render_disparities(report: &EvaluationReport) -> String {
    let mut s = String::new();
    let mut columns: Vec<&str> = report
        .methods
        .iter()
        .flat_map(|m| m.disparities.iter().map(|d| d.column.as_str()))
        .collect();
    columns.sort_unstable();
    columns.dedup();
    for column in columns {
        let _ = writeln!(
            s,
            "Disparity across `{column}` at matched false alarm episodes (sensitivity max − min, points, with in brackets the spread that chance alone reaches in 5 % of resamples at these event counts / false alarm episodes max ÷ min)"
        );
        let _ = write!(s, "{:<15}", "method");
        for l in &report.settings.matched_levels {
            let _ = write!(s, " {:>24}", format!("at {l}"));
        }
        s.push('\n');
        for m in &report.methods {
            let _ = write!(s, "{:<15}", m.method);
            for l in &report.settings.matched_levels {
                let cell = m
                    .disparities
                    .iter()
                    .find(|d| d.column == column && d.matched_level == *l)
                    .map_or_else(
                        || "–".to_owned(),
                        |d| {
                            format!(
                                "{}{} / {}",
                                opt(d.sensitivity_disparity.map(|x| 100.0 * x), 1),
                                d.sensitivity_disparity_by_chance.map_or_else(
                                    String::new,
                                    |c| format!(" [{:.1}]", 100.0 * c.p95)
                                ),
                                d.false_alarm_ratio
                                    .map_or_else(|| "–".to_owned(), |r| format!("{r:.2}×"))
                            )
                        },
                    );
                let _ = write!(s, " {cell:>24}");
            }
            s.push('\n');
        }
        // Target events per level: how much a level's sensitivity can move by chance.
        if let Some(d) = report
            .methods
            .iter()
            .flat_map(|m| &m.disparities)
            .find(|d| d.column == column)
        {
            let counts: Vec<String> = d
                .levels
                .iter()
                .map(|p| format!("{} {}", p.level, p.events))
                .collect();
            let _ = writeln!(s, "target events per level: {}", counts.join(", "));
        }
        s.push('\n');
    }
    s
}

/// CSV of the disparities: one row per method, group column, matched level and column level.
pub fn write_disparity_csv(report: &EvaluationReport, path: &Path) -> std::io::Result<()> {
    let mut s = String::from(
        "method,group_column,false_alarm_episodes_per_participant_month,threshold,group_level,participants,events,sensitivity,achieved_false_alarm_episodes,sensitivity_disparity,sensitivity_disparity_by_chance_p95,sensitivity_disparity_p_value,false_alarm_disparity,false_alarm_ratio\n",
    );
    let f = |v: Option<f64>| v.map(|x| format!("{x:.6}")).unwrap_or_default();
    for m in &report.methods {
        for d in &m.disparities {
            for p in &d.levels {
                let _ = writeln!(
                    s,
                    "{},{},{},{:.6},{},{},{},{},{},{},{},{},{},{}",
                    m.method,
                    csv_field(&d.column),
                    d.matched_level,
                    d.threshold,
                    csv_field(&p.level),
                    p.participants,
                    p.events,
                    f(p.sensitivity),
                    f(p.false_alarm_episodes_per_participant_month),
                    f(d.sensitivity_disparity),
                    f(d.sensitivity_disparity_by_chance.map(|c| c.p95)),
                    f(d.sensitivity_disparity_by_chance.map(|c| c.p_value)),
                    f(d.false_alarm_disparity),
                    f(d.false_alarm_ratio)
                );
            }
        }
    }
    std::fs::write(path, s)
}

/// CSV of the matched table: one row per method and level.
pub fn write_matched_csv(report: &EvaluationReport, path: &Path) -> std::io::Result<()> {
    let mut s = String::from(
        "method,false_alarm_episodes_per_participant_month,threshold,achieved_false_alarm_episodes,sensitivity,median_lead_from_start_days,partial_auc_to_1\n",
    );
    let f = |v: Option<f64>| v.map(|x| format!("{x:.6}")).unwrap_or_default();
    for m in &report.methods {
        for p in &m.matched {
            let _ = writeln!(
                s,
                "{},{},{},{},{},{},{}",
                m.method,
                p.false_alarm_episodes_per_participant_month,
                f(p.threshold),
                f(p.achieved_false_alarm_episodes),
                f(p.sensitivity),
                f(p.median_lead_from_start_days),
                f(m.partial_auc_to_1)
            );
        }
    }
    std::fs::write(path, s)
}

/// CSV: one row per method and subgroup, at the calibrated thresholds.
pub fn write_csv(report: &EvaluationReport, path: &Path) -> std::io::Result<()> {
    let mut s = String::from(
        "method,subgroup_column,subgroup_level,participants,events,events_detected,sensitivity,\
false_alarms_per_participant_month,false_alarm_episodes_per_participant_month,median_lead_from_start_days,median_lead_from_onset_days,coverage_95,mean_nlpd,days_outside_targets,calibration_signal_days\n",
    );
    let f = |v: Option<f64>| v.map(|x| format!("{x:.6}")).unwrap_or_default();
    for m in &report.methods {
        for g in &m.subgroups {
            let x = &g.metrics;
            let _ = writeln!(
                s,
                "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
                m.method,
                csv_field(&g.column),
                csv_field(&g.level),
                x.participants,
                x.events,
                x.events_detected,
                f(x.sensitivity),
                f(x.false_alarms_per_participant_month),
                f(x.false_alarm_episodes_per_participant_month),
                f(x.median_lead_from_start_days),
                f(x.median_lead_from_onset_days),
                f(x.coverage_95),
                f(x.mean_nlpd),
                x.days_outside_targets,
                x.calibration_signal_days
            );
        }
    }
    std::fs::write(path, s)
}

fn csv_field(v: &str) -> String {
    if v.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", v.replace('"', "\"\""))
    } else {
        v.to_owned()
    }
}

pub fn write_json(report: &EvaluationReport, path: &Path) -> std::io::Result<()> {
    let text = serde_json::to_string_pretty(report).map_err(std::io::Error::other)?;
    std::fs::write(path, text + "\n")
}

/// Okabe & Ito (2008) colour-blind-safe palette, with a distinct marker per series.
const PALETTE: [(&str, &str); 5] = [
    ("#E69F00", "square"),
    ("#0072B2", "circle"),
    ("#D55E00", "square"),
    ("#009E73", "triangle"),
    ("#CC79A7", "diamond"),
];

fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn marker(shape: &str, x: f64, y: f64, colour: &str) -> String {
    match shape {
        "square" => format!(
            r#"<rect x="{:.1}" y="{:.1}" width="8" height="8" fill="{colour}"/>"#,
            x - 4.0,
            y - 4.0
        ),
        "triangle" => format!(
            r#"<polygon points="{:.1},{:.1} {:.1},{:.1} {:.1},{:.1}" fill="{colour}"/>"#,
            x,
            y - 5.0,
            x - 5.0,
            y + 4.0,
            x + 5.0,
            y + 4.0
        ),
        "diamond" => format!(
            r#"<polygon points="{:.1},{:.1} {:.1},{:.1} {:.1},{:.1} {:.1},{:.1}" fill="{colour}"/>"#,
            x,
            y - 5.0,
            x + 5.0,
            y,
            x,
            y + 5.0,
            x - 5.0,
            y
        ),
        _ => format!(r#"<circle cx="{x:.1}" cy="{y:.1}" r="4" fill="{colour}"/>"#),
    }
}

/// SVG: sensitivity (y) against false alarm episodes per participant-month
/// (x), one line per method over the threshold sweep.
pub fn render_svg(report: &EvaluationReport) -> String {
    let caution_lines = wrap_words(CAUTION, 118);
    let caution_height = 13.0 * caution_lines.len() as f64;
    let (w, h) = (720.0, 466.0 + caution_height);
    let (left, right, top, bottom) = (70.0, 190.0, 40.0, 66.0 + caution_height);
    let pw = w - left - right;
    let ph = h - top - bottom;
    // Logarithmic x axis: the sweep spans two orders of magnitude of false alarms, and the
    // region that matters (well under one a month) would be squeezed on a linear one.
    let rates: Vec<f64> = report
        .methods
        .iter()
        .flat_map(|m| {
            m.curve
                .iter()
                .filter_map(|p| p.false_alarm_episodes_per_participant_month)
        })
        .collect();
    let x_max = nice_ceiling(rates.iter().copied().fold(0.1f64, f64::max));
    let x_min = nice_floor(
        rates
            .iter()
            .copied()
            .filter(|r| *r > 0.0)
            .fold(x_max / 10.0, f64::min),
    );
    let (log_min, log_max) = (x_min.log10(), x_max.log10());
    let sx = |x: f64| {
        left + pw * ((x.max(x_min).log10() - log_min) / (log_max - log_min)).clamp(0.0, 1.0)
    };
    let sy = |y: f64| top + ph * (1.0 - y.clamp(0.0, 1.0));
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" height="{h}" role="img" aria-labelledby="t d" font-family="sans-serif" font-size="12">"#
    );
    let _ = write!(
        s,
        r#"<title id="t">Sensitivity against false alarm episodes per participant-month</title>"#
    );
    let mut desc = String::from("Threshold sweep per method. ");
    for m in &report.methods {
        let pts: Vec<String> = m
            .curve
            .iter()
            .map(|p| {
                format!(
                    "≥{:.2}: {} FA episodes, {}",
                    p.threshold,
                    opt(p.false_alarm_episodes_per_participant_month, 2),
                    pct(p.sensitivity)
                )
            })
            .collect();
        let _ = write!(desc, "{}: {}. ", m.method, pts.join("; "));
    }
    let _ = write!(s, r#"<desc id="d">{}</desc>"#, escape(&desc));
    let _ = write!(
        s,
        r##"<rect x="0" y="0" width="{w}" height="{h}" fill="#ffffff"/>"##
    );
    // Grid and axes.
    for i in 0..=5 {
        let y = i as f64 / 5.0;
        let _ = write!(
            s,
            r##"<line x1="{left}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="#dddddd"/><text x="{:.1}" y="{:.1}" text-anchor="end">{:.0}%</text>"##,
            left + pw,
            sy(y),
            sy(y),
            left - 6.0,
            sy(y) + 4.0,
            100.0 * y
        );
    }
    for x in log_ticks(x_min, x_max) {
        let _ = write!(
            s,
            r##"<line y1="{top}" y2="{:.1}" x1="{:.1}" x2="{:.1}" stroke="#eeeeee"/><text x="{:.1}" y="{:.1}" text-anchor="middle">{}</text>"##,
            top + ph,
            sx(x),
            sx(x),
            sx(x),
            top + ph + 18.0,
            trim_number(x)
        );
    }
    let _ = write!(
        s,
        r##"<rect x="{left}" y="{top}" width="{pw}" height="{ph}" fill="none" stroke="#444444"/>"##
    );
    let _ = write!(
        s,
        r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">False alarm episodes per participant-month (no alarm day in a target event; log scale)</text>"#,
        left + pw / 2.0,
        top + ph + 44.0
    );
    let _ = write!(
        s,
        r#"<text transform="translate(18 {:.1}) rotate(-90)" text-anchor="middle">Event sensitivity</text>"#,
        top + ph / 2.0
    );
    let _ = write!(
        s,
        r#"<text x="{left}" y="24" font-size="14">Detection on {} — thresholds scaled around the calibrated setting</text>"#,
        escape(&report.cohort)
    );
    let mut any_point = false;
    for (i, m) in report.methods.iter().enumerate() {
        let (colour, shape) = PALETTE[i % PALETTE.len()];
        let xy: Vec<(f64, f64)> = m
            .curve
            .iter()
            .filter_map(|p| {
                Some((
                    sx(p.false_alarm_episodes_per_participant_month?),
                    sy(p.sensitivity?),
                ))
            })
            .collect();
        if !xy.is_empty() {
            any_point = true;
            let pts: Vec<String> = xy.iter().map(|(x, y)| format!("{x:.1},{y:.1}")).collect();
            let _ = write!(
                s,
                r#"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="2"/>"#,
                pts.join(" ")
            );
        }
        for &(x, y) in &xy {
            s.push_str(&marker(shape, x, y, colour));
        }
        // Ring the calibrated setting (scale 1).
        if let Some(p) = m.curve.iter().min_by(|a, b| {
            (a.threshold - m.alert_threshold.threshold)
                .abs()
                .total_cmp(&(b.threshold - m.alert_threshold.threshold).abs())
        }) && let (Some(fa), Some(sens)) =
            (p.false_alarm_episodes_per_participant_month, p.sensitivity)
        {
            let _ = write!(
                s,
                r#"<circle cx="{:.1}" cy="{:.1}" r="9" fill="none" stroke="{colour}" stroke-width="1.5"/>"#,
                sx(fa),
                sy(sens)
            );
        }
        let ly = top + 16.0 + 22.0 * i as f64;
        let lx = left + pw + 16.0;
        s.push_str(&marker(shape, lx, ly - 4.0, colour));
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{:.1}">{}</text>"#,
            lx + 10.0,
            ly,
            escape(&m.method)
        );
    }
    if any_point {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{:.1}" font-size="11">ring: calibrated</text><text x="{:.1}" y="{:.1}" font-size="11">thresholds (×1)</text>"#,
            left + pw + 16.0,
            top + 16.0 + 22.0 * report.methods.len() as f64 + 8.0,
            left + pw + 16.0,
            top + 16.0 + 22.0 * report.methods.len() as f64 + 22.0
        );
    }
    if !any_point {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">No target events in this cohort: sensitivity is undefined.</text>"#,
            left + pw / 2.0,
            top + ph / 2.0
        );
    }
    for (i, line) in caution_lines.iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="{left}" y="{:.1}" font-size="10">{}</text>"#,
            h - caution_height + 9.0 + 13.0 * i as f64,
            escape(line)
        );
    }
    s.push_str("</svg>\n");
    s
}

fn nice_ceiling(x: f64) -> f64 {
    let mag = 10f64.powf(x.log10().floor());
    for m in [1.0, 2.0, 2.5, 5.0, 10.0] {
        if m * mag >= x {
            return m * mag;
        }
    }
    10.0 * mag
}

/// The largest of 1, 2, 5 × 10^k not above `x` (positive).
fn nice_floor(x: f64) -> f64 {
    let mag = 10f64.powf(x.log10().floor());
    for m in [5.0, 2.0, 1.0] {
        if m * mag <= x {
            return m * mag;
        }
    }
    mag
}

/// Ticks 1, 2, 5 × 10^k from `lo` to `hi` inclusive.
fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let mut out = Vec::new();
    let mut k = lo.log10().floor() as i32;
    while 10f64.powi(k) <= hi * (1.0 + 1e-9) {
        for m in [1.0, 2.0, 5.0] {
            let t = m * 10f64.powi(k);
            if t >= lo * (1.0 - 1e-9) && t <= hi * (1.0 + 1e-9) {
                out.push(t);
            }
        }
        k += 1;
    }
    out
}

fn trim_number(x: f64) -> String {
    let s = format!("{x:.4}");
    s.trim_end_matches('0').trim_end_matches('.').to_owned()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nice_ceiling_rounds_up_to_a_tidy_axis_end() {
        assert_eq!(nice_ceiling(0.37), 0.5);
        assert_eq!(nice_ceiling(3.2), 5.0);
        assert_eq!(nice_ceiling(1.0), 1.0);
        assert_eq!(nice_floor(0.12), 0.1);
        assert_eq!(nice_floor(0.37), 0.2);
        assert_eq!(nice_floor(6.0), 5.0);
        assert_eq!(
            log_ticks(0.1, 20.0),
            [0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0]
        );
    }
}
