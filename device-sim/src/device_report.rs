//! What a device writes about its own participant after detection
//! ([`crate::episode_flags`]): the prospective days (CSV), the episodes (CSV
//! and JSON, one row per episode, both directions) and a self-contained HTML
//! report that opens without network access.
//!
//! Everything here stays on the device. The report carries the
//! non-diagnostic caution on its first screen.

use std::fmt::Write as _;
use std::io::Write as _;
use std::path::Path;

use crate::detect::DetectConfig;
use crate::detect::calibration::StudyCalibration;
use crate::episode_flags::{EpisodeDetection, EpisodeDirection, EpisodeFlag, detect_episodes};
use crate::flags::FlagLevel;
use crate::packets::{DayRow, PacketDayStatus};
use crate::signal::Signal;
use plimsoll_server::review::charts::{CHART_STYLE, SeriesChart, Stretch, series_legend};

/// The caution shown wherever a flag is shown to a person: the one caution
/// of [`plimsoll_proto::caution`], shared with the review pages.
pub const CAUTION: &str = plimsoll_proto::caution::TEXT;

/// The sidecar beside `flags.csv` and `prospective.csv` holding [`CAUTION`]:
/// the CSVs stay plain RFC 4180 (a comment line would break readers that
/// expect the header first), and the caution sits in the same folder.
pub const CAUTION_FILE: &str = "CAUTION.txt";

/// `n` with the noun in the right number: "1 Alert", "3 Alerts".
pub fn counted(n: usize, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// One sentence on what the bands mean.
pub const BANDS_EXPLAINED: &str = "The shaded bands are where a day's value was expected to fall, \
predicted each day from earlier days only: the darker band holds half of expected values, the \
lighter band 95 of 100.";

fn csv_field(v: &str) -> String {
    if v.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", v.replace('"', "\"\""))
    } else {
        v.to_owned()
    }
}

/// "resting_hr_bpm up +3.10; hrv_rmssd_ms down -2.40".
fn signals_field(e: &EpisodeFlag) -> String {
    e.involved
        .iter()
        .map(|d| {
            format!(
                "{} {} {:+.2}",
                d.signal.column(),
                d.direction.as_str(),
                d.departure
            )
        })
        .collect::<Vec<_>>()
        .join("; ")
}

fn direction_name(d: EpisodeDirection) -> &'static str {
    match d {
        EpisodeDirection::Target => "target",
        EpisodeDirection::Mirror => "mirror",
    }
}

/// `flags.csv`: one row per episode, both directions (`alerted` is false for the opposite
/// direction, which is recorded only).
pub fn write_flags_csv(
    path: &Path,
    participant: &str,
    episodes: &[EpisodeFlag],
) -> std::io::Result<()> {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path)?);
    writeln!(
        out,
        "participant,episode_key,direction,alerted,level,start,first_alarm,peak,peak_score,end,\
         ongoing,alarm_days,signals,reason"
    )?;
    for e in episodes {
        writeln!(
            out,
            "{},{},{},{},{},{},{},{},{:.4},{},{},{},{},{}",
            csv_field(participant),
            e.key,
            direction_name(e.direction),
            e.alerted(),
            level_name(e.level),
            e.start,
            e.first_alarm,
            e.peak,
            e.peak_score,
            e.end,
            e.ongoing,
            e.alarm_days,
            csv_field(&signals_field(e)),
            csv_field(&e.reason)
        )?;
    }
    out.flush()
}

/// `flags.json`: `{ "caution": …, "calibration": {…}, "episodes": [ … ] }`.
pub fn write_flags_json(
    path: &Path,
    detection: &EpisodeDetection,
    calibration: &StudyCalibration,
) -> std::io::Result<()> {
    let doc = serde_json::json!({
        "caution": CAUTION,
        "calibration": {
            "calibrated": calibration.is_calibrated(),
            "alert_threshold": calibration.alert.threshold,
            "watch_threshold": calibration.watch.threshold,
            "participant_months": calibration.participant_months(),
        },
        "episodes": detection.episodes,
    });
    let text = serde_json::to_string_pretty(&doc).map_err(std::io::Error::other)?;
    std::fs::write(path, text + "\n")
}

/// `prospective.csv`: every observed signal-day against the guarded baseline, with the
/// day's joint score and its mirror.
pub fn write_days_csv(path: &Path, detection: &EpisodeDetection) -> std::io::Result<()> {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path)?);
    writeln!(
        out,
        "date,signal,observed,mean,sd,lo50,hi50,lo95,hi95,z,tail_p,conditioned,status,score,mirror"
    )?;
    let days = &detection.scores.days;
    let opt = |v: Option<f64>| v.map_or_else(String::new, |v| format!("{v:.4}"));
    for d in &detection.rows {
        let day = days
            .binary_search_by_key(&d.date, |s| s.date)
            .ok()
            .map(|i| &days[i]);
        writeln!(
            out,
            "{},{},{},{:.4},{:.4},{:.4},{:.4},{:.4},{:.4},{:.4},{:.6},{},{},{},{}",
            d.date,
            d.signal,
            d.observed,
            d.mean,
            d.sd,
            d.lo50,
            d.hi50,
            d.lo95,
            d.hi95,
            d.z,
            d.tail_p,
            d.conditioned,
            status_name(d.status),
            opt(day.and_then(|x| x.score)),
            opt(day.and_then(|x| x.mirror))
        )?;
    }
    out.flush()
}

fn level_name(l: FlagLevel) -> &'static str {
    match l {
        FlagLevel::Watch => "watch",
        FlagLevel::Alert => "alert",
    }
}

fn status_name(s: PacketDayStatus) -> &'static str {
    match s {
        PacketDayStatus::BuildingBaseline => "building_baseline",
        PacketDayStatus::Normal => "normal",
        PacketDayStatus::Flagged => "alarm_day",
    }
}

fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// One signal's scored days as the review pages' chart takes them, with the
/// population-only band of the shared prior.
fn chart_window(
    signal: Signal,
    days: &[&DayRow],
    prior: Option<&crate::prior::PriorParams>,
) -> plimsoll_server::packets::SignalWindow {
    use plimsoll_server::packets as sp;
    let population = prior.map_or(
        sp::PopulationBand {
            mean: f64::NAN,
            lo50: f64::NAN,
            hi50: f64::NAN,
            lo95: f64::NAN,
            hi95: f64::NAN,
        },
        |p| {
            let b = crate::packets::population_band(p);
            sp::PopulationBand {
                mean: b.mean,
                lo50: b.lo50,
                hi50: b.hi50,
                lo95: b.lo95,
                hi95: b.hi95,
            }
        },
    );
    sp::SignalWindow {
        signal: signal.column().to_owned(),
        population,
        days: days
            .iter()
            .map(|d| sp::WindowDay {
                date: d.date,
                observed: d.observed,
                mean: d.mean,
                sd: d.sd,
                lo50: d.lo50,
                hi50: d.hi50,
                lo95: d.lo95,
                hi95: d.hi95,
                z: d.z,
                tail_p: d.tail_p,
                conditioned: d.conditioned,
                status: match d.status {
                    PacketDayStatus::BuildingBaseline => sp::DayStatus::BuildingBaseline,
                    PacketDayStatus::Normal => sp::DayStatus::Normal,
                    PacketDayStatus::Flagged => sp::DayStatus::Flagged,
                },
            })
            .collect(),
    }
}

/// One signal's chart, description and legend: the review pages' own chart
/// (`plimsoll_server::review::charts`), so the report and the pages share
/// one marker scheme and one legend.
fn signal_figure(
    i: usize,
    signal: Signal,
    days: &[&DayRow],
    prior: Option<&crate::prior::PriorParams>,
    episodes: &[Stretch],
) -> String {
    let (Some(first), Some(last)) = (days.first(), days.last()) else {
        return String::new();
    };
    let window = chart_window(signal, days, prior);
    let chart = SeriesChart {
        id: &format!("chart-{i}"),
        title: signal.label(),
        unit: signal.unit(),
        window: &window,
        window_start: first.date,
        window_end: last.date,
        flagged: episodes,
        height: 260.0,
        floor: plimsoll_server::presentation::floor_of(signal.column()),
    };
    format!(
        "<figure>{}<figcaption>{}</figcaption>{}</figure>",
        chart.svg(),
        escape(&chart.description()),
        series_legend(!episodes.is_empty())
    )
}

/// The self-contained HTML report of one participant.
pub fn render_report_html(
    participant: &str,
    detection: &EpisodeDetection,
    priors: &[crate::prior::PriorParams],
) -> String {
    let mut signals: Vec<Signal> = detection.rows.iter().map(|d| d.signal).collect();
    signals.sort_unstable();
    signals.dedup();
    let mut body = String::new();
    let _ = write!(
        body,
        r#"<section class="caution" role="note"><strong>Please read:</strong> {}<br>{}</section>"#,
        escape(CAUTION),
        escape(BANDS_EXPLAINED)
    );
    if !detection.calibrated {
        body.push_str(r#"<p class="caution"><strong>Uncalibrated:</strong> this study has no calibration yet; thresholds follow a nominal rule and the odds in each reason are the model's alone.</p>"#);
    }
    let alerted: Vec<&EpisodeFlag> = detection.episodes.iter().filter(|e| e.alerted()).collect();
    let _ = write!(body, "<h2>Episodes ({})</h2>", alerted.len());
    if alerted.is_empty() {
        body.push_str("<p>No episode was flagged.</p>");
    } else {
        body.push_str("<table><thead><tr><th>Episode</th><th>Level</th><th>Signals</th><th>Reason</th></tr></thead><tbody>");
        for e in &alerted {
            let _ = write!(
                body,
                "<tr><td>{} to {}{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                e.start,
                e.end,
                if e.ongoing { " (ongoing)" } else { "" },
                level_name(e.level),
                escape(&signals_field(e)),
                escape(&e.reason)
            );
        }
        body.push_str("</tbody></table>");
    }
    let mirrors = detection.episodes.len() - alerted.len();
    if mirrors > 0 {
        let _ = write!(
            body,
            "<p>{mirrors} episode{} in the opposite direction recorded in flags.csv (never alerted).</p>",
            if mirrors == 1 { "" } else { "s" }
        );
    }
    let episodes: Vec<Stretch> = alerted
        .iter()
        .map(|e| Stretch {
            start: e.start,
            end: e.end,
            level: match e.level {
                FlagLevel::Alert => plimsoll_server::packets::FlagLevel::Alert,
                FlagLevel::Watch => plimsoll_server::packets::FlagLevel::Watch,
            },
        })
        .collect();
    for (i, signal) in signals.into_iter().enumerate() {
        let days: Vec<&DayRow> = detection
            .rows
            .iter()
            .filter(|d| d.signal == signal)
            .collect();
        let _ = write!(
            body,
            "<h2>{} ({})</h2>",
            escape(signal.label()),
            escape(signal.unit())
        );
        let prior = priors.iter().find(|p| p.signal == signal);
        body.push_str(&signal_figure(i, signal, &days, prior, &episodes));
        body.push_str("<details><summary>Values as a table</summary><table><thead><tr><th>Date</th><th>Observed</th><th>Expected</th><th>95% band</th><th>Status</th></tr></thead><tbody>");
        for d in &days {
            let _ = write!(
                body,
                "<tr><td>{}</td><td>{:.2}</td><td>{:.2}</td><td>{:.2} – {:.2}</td><td>{}</td></tr>",
                d.date,
                d.observed,
                d.mean,
                d.lo95,
                d.hi95,
                status_name(d.status).replace('_', " ")
            );
        }
        body.push_str("</tbody></table></details>");
    }
    format!(
        r#"<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>Plimsoll — participant {p}</title>
<style>
body{{font-family:system-ui,sans-serif;margin:0 auto;max-width:920px;padding:1rem 1.25rem;color:#1b1b1b;background:#fbfaf7;line-height:1.45}}
h1{{font-size:1.35rem;margin:.2rem 0 1rem}} h2{{font-size:1.1rem;margin-top:1.6rem;border-bottom:1px solid #d8d3c8}}
.caution{{background:#fff4d6;border-left:6px solid #E69F00;padding:.7rem .9rem;margin:.5rem 0 1rem}}
table{{border-collapse:collapse;width:100%;font-size:.9rem}} td,th{{border-bottom:1px solid #e4e0d6;padding:.25rem .4rem;text-align:left}}
figure{{margin:.5rem 0}} figcaption{{font-size:.85rem;color:#444}}
{chart_style}
summary:focus,a:focus{{outline:3px solid #0072B2;outline-offset:2px}}
</style></head><body>
<h1>Daily measures of participant {p}</h1>
{body}
<p class="caution">{caution}</p>
</body></html>
"#,
        p = escape(participant),
        caution = escape(CAUTION),
        chart_style = CHART_STYLE
    )
}

/// Runs episode detection for one participant under the shared priors and the study's
/// calibration ([`StudyCalibration::uncalibrated`] when the study has none) and writes
/// `prospective.csv`, `flags.csv`, `flags.json` and `report.html` into `out_dir` (created if
/// missing). Returns the detection.
pub fn detect_and_write(
    out_dir: &Path,
    series: &crate::cohort::ParticipantSeries,
    priors: &[crate::prior::PriorParams],
    calibration: &StudyCalibration,
) -> anyhow::Result<EpisodeDetection> {
    use anyhow::Context;
    // Scores in the direction the thresholds were calibrated in (the study's).
    let cfg = DetectConfig {
        pattern: calibration.pattern,
        ..DetectConfig::default()
    };
    let detection = detect_episodes(series, priors, calibration, &cfg)?;
    std::fs::create_dir_all(out_dir).with_context(|| format!("creating {}", out_dir.display()))?;
    let write = |name: &str, result: std::io::Result<()>| {
        result.with_context(|| format!("writing {}", out_dir.join(name).display()))
    };
    write(
        CAUTION_FILE,
        std::fs::write(
            out_dir.join(CAUTION_FILE),
            format!(
                "{CAUTION}\n\nThis caution applies to flags.csv, flags.json, prospective.csv and report.html in this folder.\n"
            ),
        ),
    )?;
    write(
        "prospective.csv",
        write_days_csv(&out_dir.join("prospective.csv"), &detection),
    )?;
    write(
        "flags.csv",
        write_flags_csv(
            &out_dir.join("flags.csv"),
            &series.participant,
            &detection.episodes,
        ),
    )?;
    write(
        "flags.json",
        write_flags_json(&out_dir.join("flags.json"), &detection, calibration),
    )?;
    write(
        "report.html",
        std::fs::write(
            out_dir.join("report.html"),
            render_report_html(&series.participant, &detection, priors),
        ),
    )?;
    Ok(detection)
}

#[cfg(test)]
mod tests {
    use chrono::NaiveDate;

    use super::*;

    #[test]
    fn counts_take_the_right_number() {
        assert_eq!(counted(1, "Alert", "Alerts"), "1 Alert");
        assert_eq!(counted(0, "Alert", "Alerts"), "0 Alerts");
        assert_eq!(counted(2, "episode", "episodes"), "2 episodes");
    }
    use crate::cohort::ParticipantSeries;
    use crate::prior::PriorParams;
    use std::collections::BTreeMap;

    /// A 60-day resting-HR series with a step of +15 bpm from day 48 (12 days: within the
    /// 14-day episode cap, so one episode).
    fn stepped_series() -> ParticipantSeries {
        let start = NaiveDate::from_ymd_opt(2026, 2, 2).unwrap();
        let dates: Vec<NaiveDate> = (0..60).map(|d| start + chrono::Duration::days(d)).collect();
        let values = (0..60)
            .map(|d| Some(if d >= 48 { 80.0 } else { 65.0 } + if d % 2 == 0 { 1.0 } else { -1.0 }))
            .collect();
        ParticipantSeries {
            participant: "demo-p1".into(),
            dates,
            values: BTreeMap::from([(Signal::RestingHr, values)]),
        }
    }

    #[test]
    fn outputs_carry_the_caution_and_need_no_network() {
        let dir = std::env::temp_dir().join(format!("plimsoll-report-{}", std::process::id()));
        let priors = [PriorParams::initial(Signal::RestingHr)];
        let calibration = StudyCalibration::uncalibrated();
        let detection = detect_and_write(&dir, &stepped_series(), &priors, &calibration).unwrap();
        let alerted: Vec<&EpisodeFlag> = detection.for_review(FlagLevel::Alert).collect();
        // One 15 bpm step is one episode (the grouping rule), not one flag per day.
        assert_eq!(alerted.len(), 1, "{:#?}", detection.episodes);
        let e = alerted[0];
        assert_eq!(e.involved[0].signal, Signal::RestingHr);
        assert_eq!(
            e.involved[0].direction,
            crate::episode_flags::SignalDirection::Up
        );
        assert!(e.reason.starts_with("UNCALIBRATED"), "{}", e.reason);
        let html = std::fs::read_to_string(dir.join("report.html")).unwrap();
        assert!(html.contains("not a diagnosis"));
        assert!(html.contains("qualified clinician"));
        assert!(html.contains("Local protocols and regulations"));
        // Self-contained: no external resource of any kind.
        for needle in [
            "http://",
            "https://",
            "<script src",
            "<link",
            "@import",
            "url(",
        ] {
            assert!(
                !html.contains(needle),
                "report.html must not reference `{needle}`"
            );
        }
        assert!(html.contains("<svg"));
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join("flags.json")).unwrap())
                .unwrap();
        assert_eq!(
            json["episodes"].as_array().unwrap().len(),
            detection.episodes.len()
        );
        assert_eq!(json["calibration"]["calibrated"], false);
        assert!(
            json["caution"]
                .as_str()
                .unwrap()
                .contains("not a diagnosis")
        );
        let csv = std::fs::read_to_string(dir.join("flags.csv")).unwrap();
        assert_eq!(csv.lines().count(), detection.episodes.len() + 1);
        assert!(csv.contains(",target,true,alert,"), "{csv}");
        let days = std::fs::read_to_string(dir.join("prospective.csv")).unwrap();
        assert_eq!(days.lines().count(), 61);
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
