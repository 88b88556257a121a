//! The review pages: login, studies, study overview (with the lead's view:
//! participants, data completeness, review backlog, episodes per week), one
//! participant, the episode queue and one episode.

use std::fmt::Write;

use chrono::NaiveDate;

use super::accounts::Session;
use super::charts::{
    ConvergenceChart, SeriesChart, Stretch, fmt_num, marker, palette, series_legend,
};
use super::db::{
    Backlog, FlagRecord, ParticipantRow, QueueEntry, QueueFilter, ReviewAction, ReviewStatus,
    StudyOverview,
};
use super::html::{esc, page};
use crate::packets::{DayStatus, FlagLevel, FlagPacket, PatternDirection, SignalWindow};
use crate::presentation::{floor_of, fmt_signal_value, label_of, plain_prior, unit_of};

/// A UTC timestamp for display.
pub fn utc(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms).map_or_else(
        || "–".into(),
        |t| t.format("%Y-%m-%d %H:%M UTC").to_string(),
    )
}

/// A timestamp as RFC 3339 in UTC with milliseconds (`2024-04-11T08:30:00.000Z`).
pub fn rfc3339(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms).map_or_else(
        || "1970-01-01T00:00:00.000Z".into(),
        |t| t.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
    )
}

fn level_badge(level: FlagLevel) -> String {
    let (class, text) = match level {
        FlagLevel::Alert => ("level-alert", "Alert"),
        FlagLevel::Watch => ("level-watch", "Watch"),
    };
    format!(r#"<span class="badge {class}">{text}</span>"#)
}

fn status_badge(status: ReviewStatus) -> String {
    let text = match status {
        ReviewStatus::New => "New",
        ReviewStatus::Acknowledged => "Acknowledged",
        ReviewStatus::Dismissed => "Dismissed",
        ReviewStatus::Escalated => "Escalated",
    };
    format!(
        r#"<span class="badge status-{}">{text}</span>"#,
        status.as_str()
    )
}

fn signal_name(signal: Option<&str>) -> String {
    signal.map_or_else(|| "Several signals".into(), label_of)
}

/// "Resting heart rate ↑ up, Overnight HRV ↓ down" (the word always with the arrow).
fn involved_text(involved: &[(String, crate::packets::SignalDirection)]) -> String {
    if involved.is_empty() {
        return "several signals (not recorded)".into();
    }
    involved
        .iter()
        .map(|(s, d)| format!("{} {} {}", label_of(s), d.arrow(), d.as_str()))
        .collect::<Vec<_>>()
        .join(", ")
}

fn direction_text(direction: Option<PatternDirection>) -> &'static str {
    match direction {
        Some(PatternDirection::Target) => "along the study's pattern",
        Some(PatternDirection::Mirror) => "opposite to the study's pattern",
        None => "single signal (before episodes)",
    }
}

/// "2024-04-08 to 2024-04-11, ongoing".
fn span_text(start: NaiveDate, end: NaiveDate, ongoing: bool) -> String {
    let mut out = if start == end {
        start.to_string()
    } else {
        format!("{start} to {end}")
    };
    if ongoing {
        out.push_str(", ongoing");
    }
    out
}

pub fn login(error: Option<&str>) -> String {
    let mut body = String::new();
    if let Some(e) = error {
        let _ = write!(body, r#"<p class="error" role="alert">{}</p>"#, esc(e));
    }
    body.push_str(
        r#"<form method="post" action="/login" class="panel login">
<p><label for="name">Reviewer name</label><input type="text" id="name" name="name" autocomplete="username" required autofocus></p>
<p><label for="password">Password</label><input type="password" id="password" name="password" autocomplete="current-password" required></p>
<p><button type="submit">Sign in</button></p>
</form>"#,
    );
    page("Sign in", None, &[], &body)
}

pub fn studies(session: &Session, titles: &[(String, String)]) -> String {
    let mut body = String::new();
    if titles.is_empty() {
        body.push_str(r#"<p>You are not assigned to any study yet. An administrator assigns reviewers with <code>plimsoll-aggregator reviewer assign</code>.</p>"#);
    } else {
        body.push_str("<p>Studies you are assigned to:</p><ul>");
        for (id, title) in titles {
            let _ = write!(
                body,
                r#"<li><a href="/study/{id}">{}</a> <span class="muted">({})</span> — <a href="/study/{id}/flags">episode queue</a></li>"#,
                esc(title),
                esc(id),
                id = esc(id)
            );
        }
        body.push_str("</ul>");
    }
    page("Your studies", Some(session), &[], &body)
}

/// The study's differential-privacy spending as an overview fact (empty without `dp`).
fn privacy_fact(config: &crate::study::StudyConfig, rounds_completed: u32) -> String {
    let mut out = String::new();
    if let (Some(dp), Some(eps)) = (&config.dp, config.epsilon_spent(rounds_completed)) {
        let _ = write!(
            out,
            "\n<div><dt>Privacy spent (user-level)</dt><dd>ε = {eps:.2} of {:.2} (δ = {:.1e}); training stops before the budget is passed</dd></div>",
            dp.epsilon_budget, dp.delta
        );
    }
    if config.secure_aggregation.is_some() {
        out.push_str(
            "\n<div><dt>Secure aggregation</dt><dd>on: the aggregator sees only each round's and each calibration stage's sum, never one device's</dd></div>",
        );
    }
    out
}

pub fn overview(session: &Session, o: &StudyOverview, now_ms: i64) -> String {
    let id = &o.config.study_id;
    let latest = o.priors.last();
    let mut body = String::new();
    let _ = write!(
        body,
        r#"<p class="muted">Study <code>{}</code>. <a href="/study/{}/flags">Open the episode queue</a> ({} episodes, {} not yet reviewed).</p>
<dl class="facts">
<div><dt>Participants enrolled</dt><dd>{}</dd></div>
<div><dt>Sharing flags (consented)</dt><dd>{}</dd></div>
<div><dt>Rounds run</dt><dd>{} of {}</dd></div>
<div><dt>Shared prior version</dt><dd>{}</dd></div>{}
</dl>{}"#,
        esc(id),
        esc(id),
        o.flags_total,
        o.flags_new,
        o.devices_enrolled,
        o.devices_consenting,
        o.rounds_completed,
        o.config.round_limit(),
        latest.map_or(0, |p| p.version),
        privacy_fact(&o.config, o.rounds_completed),
        lead_view(o, now_ms)
    );
    body.push_str(r#"<h2>Shared prior, in plain units</h2>
<p class="muted">What the study learned about the population, without any participant's data leaving their device: the typical level, how much people differ from each other, and how much one person's days vary.</p>
<table><caption>Shared prior per signal (latest version)</caption>
<thead><tr><th scope="col">Signal</th><th scope="col" class="num">Population mean</th><th scope="col" class="num">Between-person SD</th><th scope="col" class="num">Slow-trend SD</th><th scope="col" class="num">Trend length</th><th scope="col" class="num">Weekly rhythm SD</th><th scope="col" class="num">Day-to-day SD</th></tr></thead><tbody>"#);
    for layout in &o.config.signals {
        let values = latest
            .and_then(|p| p.params.iter().find(|s| s.signal == layout.signal))
            .map(|p| p.values.as_slice())
            .unwrap_or(&layout.initial);
        let plain = plain_prior(layout, values);
        let unit = unit_of(&layout.signal);
        let v = |x: Option<f64>, unit: &str| {
            x.map_or_else(
                || "–".into(),
                |x| format!("{} {unit}", fmt_signal_value(&layout.signal, x)),
            )
        };
        let _ = write!(
            body,
            r#"<tr><th scope="row">{}</th><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td></tr>"#,
            esc(&label_of(&layout.signal)),
            v(plain.population_mean, unit),
            v(plain.between_sd, unit),
            v(plain.trend_sd, unit),
            plain
                .trend_len_days
                .map_or_else(|| "–".into(), |d| format!("{d:.1} days")),
            v(plain.weekly_sd, unit),
            v(plain.noise_sd, unit),
        );
    }
    body.push_str("</tbody></table>");

    body.push_str("<h2>Convergence of federated training</h2>");
    let signals: Vec<String> = o.config.signals.iter().map(|s| s.signal.clone()).collect();
    let rounds: Vec<(u64, Vec<Option<f64>>)> = o
        .priors
        .iter()
        .filter(|p| p.round_id > 0)
        .map(|p| {
            let per_signal = signals
                .iter()
                .map(|s| {
                    p.contributions
                        .iter()
                        .find(|c| &c.signal == s)
                        .map(|c| c.mean_local_loss)
                })
                .collect();
            (p.round_id, per_signal)
        })
        .collect();
    if rounds.is_empty() {
        body.push_str("<p>No round has closed yet.</p>");
    } else {
        body.push_str(r#"<p class="muted">Each point is the pooled objective (average negative log-likelihood per day, across the devices that took part) of the prior a round started from. Lines that flatten mean the shared prior has settled.</p><figure>"#);
        body.push_str(
            &ConvergenceChart {
                id: "convergence",
                signals: &signals,
                rounds: &rounds,
            }
            .svg(),
        );
        body.push_str(r#"<ul class="legend" aria-hidden="true">"#);
        for (i, s) in signals.iter().enumerate() {
            let colour = palette::SERIES[i % palette::SERIES.len()];
            let _ = write!(
                body,
                r#"<li><svg width="14" height="14" viewBox="0 0 14 14">{}</svg>{}</li>"#,
                marker(i, 7.0, 7.0, colour),
                esc(&label_of(s))
            );
        }
        body.push_str("</ul><details><summary>Convergence as a table</summary><table><caption>Pooled objective per round (nats/day)</caption><thead><tr><th scope=\"col\">Round</th>");
        for s in &signals {
            let _ = write!(
                body,
                r#"<th scope="col" class="num">{}</th>"#,
                esc(&label_of(s))
            );
        }
        body.push_str("</tr></thead><tbody>");
        for (r, values) in &rounds {
            let _ = write!(body, r#"<tr><th scope="row">{r}</th>"#);
            for v in values {
                let _ = write!(
                    body,
                    r#"<td class="num">{}</td>"#,
                    v.map_or_else(|| "–".into(), |v| format!("{v:.4}"))
                );
            }
            body.push_str("</tr>");
        }
        body.push_str("</tbody></table></details></figure>");
    }
    page(
        &o.config.title,
        Some(session),
        &[("Studies", "/"), (&o.config.title, "")],
        &body,
    )
}

fn option(value: &str, label: &str, selected: bool) -> String {
    format!(
        r#"<option value="{}"{}>{}</option>"#,
        esc(value),
        if selected { " selected" } else { "" },
        esc(label)
    )
}

pub fn queue(
    session: &Session,
    study_id: &str,
    title: &str,
    entries: &[QueueEntry],
    filter: &QueueFilter,
    signals: &[String],
) -> String {
    let mut body = String::new();
    let _ = write!(
        body,
        r#"<form method="get" action="/study/{}/flags" class="filters" aria-label="Filter flags">
<div><label for="f-signal">Signal</label><select id="f-signal" name="signal">{}"#,
        esc(study_id),
        option("", "All signals", filter.signal.is_none())
    );
    for s in signals {
        body.push_str(&option(
            s,
            &label_of(s),
            filter.signal.as_deref() == Some(s),
        ));
    }
    let _ = write!(
        body,
        r#"</select></div>
<div><label for="f-level">Level</label><select id="f-level" name="level">{}{}{}</select></div>
<div><label for="f-status">Status</label><select id="f-status" name="status">{}"#,
        option("", "All levels", filter.level.is_none()),
        option("alert", "Alert", filter.level == Some(FlagLevel::Alert)),
        option("watch", "Watch", filter.level == Some(FlagLevel::Watch)),
        option("", "Any status", filter.status.is_none()),
    );
    for s in ReviewStatus::ALL {
        let label = match s {
            ReviewStatus::New => "New (not reviewed)",
            ReviewStatus::Acknowledged => "Acknowledged",
            ReviewStatus::Dismissed => "Dismissed",
            ReviewStatus::Escalated => "Escalated",
        };
        body.push_str(&option(s.as_str(), label, filter.status == Some(s)));
    }
    let _ = write!(
        body,
        r#"</select></div>
<div><button type="submit" class="secondary">Apply filters</button></div>
</form>
<p class="muted" role="status">{} episode{} shown, alerts first, latest peak first. One row per episode: a device updates its episode as it grows.</p>"#,
        entries.len(),
        if entries.len() == 1 { "" } else { "s" }
    );
    if entries.is_empty() {
        body.push_str("<p>No episodes match these filters.</p>");
    } else {
        body.push_str(&episode_table("queue", "Episodes", study_id, entries, true));
    }
    let heading = format!("Episode queue — {title}");
    page(
        &heading,
        Some(session),
        &[
            ("Studies", "/"),
            (title, &format!("/study/{study_id}")),
            ("Episode queue", ""),
        ],
        &body,
    )
}

/// A table of episodes, one row each; the participant column (a link to
/// their page) only when `with_participant`.
fn episode_table(
    id: &str,
    caption: &str,
    study_id: &str,
    entries: &[QueueEntry],
    with_participant: bool,
) -> String {
    let mut t = format!(
        r#"<table id="{id}"><caption>{}</caption><thead><tr><th scope="col">Level</th><th scope="col">Episode</th>{}<th scope="col">Signals and direction</th><th scope="col">Pattern</th><th scope="col" class="num">Peak score (day)</th><th scope="col">Status</th></tr></thead><tbody>"#,
        esc(caption),
        if with_participant {
            r#"<th scope="col">Participant</th>"#
        } else {
            ""
        }
    );
    for e in entries {
        let updated = if e.updated_since_review {
            r#" <span class="badge status-new">Updated since review</span>"#
        } else {
            ""
        };
        let who = if with_participant {
            format!("<td>{}</td>", participant_link(study_id, &e.participant))
        } else {
            String::new()
        };
        let _ = write!(
            t,
            r#"<tr><td>{}</td><td><a href="/flag/{}">{}</a></td>{who}<td>{}</td><td>{}</td><td class="num">{} ({})</td><td>{}{updated}</td></tr>"#,
            level_badge(e.level),
            e.packet_id,
            esc(&span_text(e.start, e.end, e.ongoing)),
            esc(&involved_text(&e.involved)),
            esc(direction_text(e.direction)),
            fmt_num(e.score, 2),
            esc(&e.date),
            status_badge(e.status)
        );
    }
    t.push_str("</tbody></table>");
    t
}

/// The path of a participant's page.
pub fn participant_path(study_id: &str, label: &str) -> String {
    // Labels match [A-Za-z0-9_-] (checked at enrolment), so they need no escaping in a path.
    format!("/study/{study_id}/participant/{label}")
}

/// A participant id linked to their page.
fn participant_link(study_id: &str, label: &str) -> String {
    format!(
        r#"<a class="participant" href="{}">{}</a>"#,
        esc(&participant_path(study_id, label)),
        esc(label)
    )
}

/// A share as a whole percentage ("93%"), the one rounding the pages use for shares.
fn percent(share: f64) -> String {
    format!("{:.0}%", share * 100.0)
}

/// How long ago `then_ms` was, in the largest whole unit ("3 days", "5 hours", "under a minute").
pub fn age_text(then_ms: i64, now_ms: i64) -> String {
    let minutes = (now_ms - then_ms).max(0) / 60_000;
    let (n, unit) = if minutes >= 2 * 24 * 60 {
        (minutes / (24 * 60), "day")
    } else if minutes >= 120 {
        (minutes / 60, "hour")
    } else if minutes >= 1 {
        (minutes, "minute")
    } else {
        return "under a minute".into();
    };
    format!("{n} {unit}{}", if n == 1 { "" } else { "s" })
}

fn backlog_text(b: &Backlog, now_ms: i64) -> String {
    let waiting = match b.oldest_new_ms {
        Some(at) if b.new > 0 => format!(
            ", the oldest waiting {} (first received {})",
            age_text(at, now_ms),
            utc(at)
        ),
        _ => String::new(),
    };
    format!(
        "{} episode{} not yet reviewed{waiting}; {} reviewed episode{} grew after the latest action.",
        b.new,
        if b.new == 1 { "" } else { "s" },
        b.updated_since_review,
        if b.updated_since_review == 1 { "" } else { "s" },
    )
}

/// One participant's completeness cells, one per study signal.
fn completeness_cells(row: &ParticipantRow, signals: &[String]) -> String {
    let mut out = String::new();
    for s in signals {
        let cell = match &row.summary {
            _ if !row.signals.contains(s) => "not enrolled".to_owned(),
            None => "–".to_owned(),
            Some((summary, _)) => summary.completeness(s).map_or("–".into(), percent),
        };
        let _ = write!(out, r#"<td class="num">{}</td>"#, esc(&cell));
    }
    out
}

/// The research lead's part of the overview: consent, backlog, every
/// participant's data completeness and episodes, and episodes per week.
fn lead_view(o: &StudyOverview, now_ms: i64) -> String {
    let id = &o.config.study_id;
    let signals: Vec<String> = o.config.signals.iter().map(|s| s.signal.clone()).collect();
    let withheld = o
        .participants
        .iter()
        .filter(|p| !p.consent_share_flags)
        .count();
    let revoked = o.participants.iter().filter(|p| p.revoked).count();
    let mut body = format!(
        r#"<h2>Review backlog</h2><p id="backlog">{}</p>
<h2>Participants</h2>
<p class="muted">Consent to share flags for review: {} given, {} withheld ({} device{} revoked). Completeness is the share of days from a participant's first to last day that carry a value, from the summary each device sends (counts and dates only, never a value). Dates are the participants' local calendar days.</p>"#,
        esc(&backlog_text(&o.backlog, now_ms)),
        o.devices_consenting,
        withheld,
        revoked,
        if revoked == 1 { "" } else { "s" },
    );
    if o.participants.is_empty() {
        body.push_str("<p>No participant has enrolled yet.</p>");
    } else {
        body.push_str(r#"<table id="participants"><caption>Participants: data completeness and episodes</caption><thead><tr><th scope="col">Participant</th><th scope="col">Flags shared</th><th scope="col" class="num">Days in series</th><th scope="col">Last data day</th>"#);
        for s in &signals {
            let _ = write!(
                body,
                r#"<th scope="col" class="num">{}</th>"#,
                esc(&label_of(s))
            );
        }
        body.push_str(
            r#"<th scope="col" class="num">Episodes (not reviewed)</th></tr></thead><tbody>"#,
        );
        for p in &o.participants {
            let shared = match (p.revoked, p.consent_share_flags) {
                (true, _) => "revoked",
                (false, true) => "yes",
                (false, false) => "no (withheld)",
            };
            let (span, last) = p.summary.as_ref().map_or_else(
                || ("no summary yet".to_owned(), "–".to_owned()),
                |(s, _)| {
                    (
                        s.span_days().to_string(),
                        s.last_data_day().map_or("–".into(), |d| d.to_string()),
                    )
                },
            );
            let _ = write!(
                body,
                r#"<tr><th scope="row">{}</th><td>{shared}</td><td class="num">{}</td><td class="date">{}</td>{}<td class="num">{} ({})</td></tr>"#,
                participant_link(id, &p.label),
                esc(&span),
                esc(&last),
                completeness_cells(p, &signals),
                p.episodes,
                p.episodes_new,
            );
        }
        body.push_str("</tbody></table>");
    }
    body.push_str("<h2>Episodes by week and signal</h2>");
    if o.weekly.is_empty() {
        body.push_str("<p>No episode has been received.</p>");
    } else {
        let flagged: Vec<&String> = signals
            .iter()
            .filter(|s| o.weekly.iter().any(|(_, w)| w.contains_key(*s)))
            .collect();
        body.push_str(r#"<p class="muted">An episode counts in the week its first day falls in (weeks start on Monday), once under each signal it involves.</p><table id="weekly"><caption>Episodes per week</caption><thead><tr><th scope="col">Week of</th>"#);
        for s in &flagged {
            let _ = write!(
                body,
                r#"<th scope="col" class="num">{}</th>"#,
                esc(&label_of(s))
            );
        }
        body.push_str("</tr></thead><tbody>");
        for (monday, counts) in &o.weekly {
            let _ = write!(body, r#"<tr><th scope="row">{monday}</th>"#);
            for s in &flagged {
                let _ = write!(
                    body,
                    r#"<td class="num">{}</td>"#,
                    counts.get(*s).copied().unwrap_or(0)
                );
            }
            body.push_str("</tr>");
        }
        body.push_str("</tbody></table>");
    }
    body
}

/// One participant: enrolment, data completeness per signal, every episode.
pub fn participant(
    session: &Session,
    config: &crate::study::StudyConfig,
    row: &ParticipantRow,
    episodes: &[QueueEntry],
) -> String {
    let id = &config.study_id;
    let mut body = format!(
        r#"<dl class="facts">
<div><dt>Participant</dt><dd>{}</dd></div>
<div><dt>Flags shared for review</dt><dd>{}</dd></div>
<div><dt>Device</dt><dd>{}{}</dd></div>
</dl>"#,
        esc(&row.label),
        if row.consent_share_flags {
            "yes"
        } else {
            "no (withheld)"
        },
        row.device_id,
        if row.revoked { " (revoked)" } else { "" },
    );
    body.push_str("<h2>Data completeness</h2>");
    match &row.summary {
        None => body.push_str("<p>This participant's device has not sent a data summary yet.</p>"),
        Some((s, received)) => {
            let _ = write!(
                body,
                r#"<p class="muted">Series from {} to {} ({} days, the participant's local calendar); summary received {}.</p>
<table id="coverage"><caption>Days with a value, per signal</caption><thead><tr><th scope="col">Signal</th><th scope="col" class="num">Days with data</th><th scope="col" class="num">Completeness</th><th scope="col">Last data day</th></tr></thead><tbody>"#,
                s.first_day,
                s.last_day,
                s.span_days(),
                utc(*received),
            );
            for c in &s.signals {
                let _ = write!(
                    body,
                    r#"<tr><th scope="row">{}</th><td class="num">{}</td><td class="num">{}</td><td>{}</td></tr>"#,
                    esc(&label_of(&c.signal)),
                    c.days_with_data,
                    percent(f64::from(c.days_with_data) / f64::from(s.span_days())),
                    c.last_day.map_or("–".into(), |d| d.to_string()),
                );
            }
            body.push_str("</tbody></table>");
        }
    }
    body.push_str("<h2>Episodes</h2>");
    if episodes.is_empty() {
        body.push_str(if row.consent_share_flags {
            "<p>No episode has been received from this participant.</p>"
        } else {
            "<p>No episode is received from this participant: they did not consent to share flags.</p>"
        });
    } else {
        body.push_str(&episode_table(
            "episodes",
            "All episodes, latest peak first",
            id,
            episodes,
            false,
        ));
    }
    let heading = format!("Participant {}", row.label);
    page(
        &heading,
        Some(session),
        &[
            ("Studies", "/"),
            (&config.title, &format!("/study/{id}")),
            (&heading, ""),
        ],
        &body,
    )
}

fn data_table(chart: &SeriesChart<'_>) -> String {
    let u = chart.unit;
    let mut out = format!(
        r#"<details><summary>{} as a table</summary><table><caption>{} ({}), every day of the window</caption><thead><tr><th scope="col">Date</th><th scope="col" class="num">Measured</th><th scope="col" class="num">Expected</th><th scope="col" class="num">50% band</th><th scope="col" class="num">95% band</th><th scope="col" class="num">z</th><th scope="col">Day</th></tr></thead><tbody>"#,
        esc(chart.title),
        esc(chart.title),
        esc(u)
    );
    let mut day = chart.window_start;
    while day <= chart.window_end {
        match chart.window.days.iter().find(|d| d.date == day) {
            Some(d) => {
                let status = match d.status {
                    DayStatus::BuildingBaseline => "baseline building",
                    DayStatus::Normal => "scored",
                    DayStatus::Flagged => "flagged",
                };
                let _ = write!(
                    out,
                    r#"<tr><th scope="row">{day}</th><td class="num">{}</td><td class="num">{}</td><td class="num">{} – {}</td><td class="num">{} – {}</td><td class="num">{:.2}</td><td>{status}{}</td></tr>"#,
                    chart.value(d.observed),
                    chart.value(d.mean),
                    chart.value(d.lo50),
                    chart.value(d.hi50),
                    chart.value(d.lo95),
                    chart.value(d.hi95),
                    d.z,
                    if d.conditioned {
                        ""
                    } else {
                        ", held out of baseline"
                    }
                );
            }
            None => {
                let _ = write!(
                    out,
                    r#"<tr><th scope="row">{day}</th><td colspan="6" class="muted">no measurement</td></tr>"#
                );
            }
        }
        day += chrono::Duration::days(1);
    }
    out.push_str("</tbody></table></details>");
    out
}

fn chart_block(
    id: &str,
    window: &SignalWindow,
    start: NaiveDate,
    end: NaiveDate,
    flagged: &[Stretch],
    height: f64,
) -> String {
    let title = label_of(&window.signal);
    let chart = SeriesChart {
        id,
        title: &title,
        unit: unit_of(&window.signal),
        window,
        window_start: start,
        window_end: end,
        flagged,
        height,
        floor: floor_of(&window.signal),
    };
    let mut out = String::from("<figure>");
    out.push_str(&chart.svg());
    let _ = write!(
        out,
        "<figcaption>{}</figcaption>{}{}</figure>",
        esc(&chart.description()),
        series_legend(!flagged.is_empty()),
        data_table(&chart)
    );
    out
}

/// The numbers behind the reason: the episode's span, peak and versions.
fn reason_numbers(record: &FlagRecord) -> String {
    let p = &record.packet;
    let mut out = format!(
        "Peak score {:.2} on {} (window from {}); episode {}; {} alarm day{}",
        p.score,
        p.date,
        p.episode.peak_window_start,
        span_text(p.first_day, p.last_day, p.episode.ongoing),
        p.episode.alarm_days,
        if p.episode.alarm_days == 1 { "" } else { "s" }
    );
    if record.revisions > 1 {
        let _ = write!(
            out,
            "; version {} of this episode, received {}",
            record.revisions,
            utc(record.updated_ms)
        );
    }
    out.push('.');
    out
}

/// The involved signals with their direction and window departure.
fn departures_table(p: &FlagPacket) -> String {
    if p.episode.involved.is_empty() {
        return match &p.signal {
            Some(s) => format!(
                "<p>Signal: {} (a packet from before episodes: one signal, score {:.2}).</p>",
                esc(&label_of(s)),
                p.score
            ),
            None => "<p>Several signals (a packet from before episodes did not record each signal's departure).</p>".into(),
        };
    }
    let mut out = String::from(
        r#"<table id="departures"><caption>Signals in the peak score: how far each departed from its expected level over the peak's window</caption><thead><tr><th scope="col">Signal</th><th scope="col">Direction</th><th scope="col" class="num">Window departure (SD)</th><th scope="col" class="num">Share of the score</th></tr></thead><tbody>"#,
    );
    for d in &p.episode.involved {
        let _ = write!(
            out,
            r#"<tr><th scope="row">{}</th><td>{} {}</td><td class="num">{:+.2}</td><td class="num">{:.2}</td></tr>"#,
            esc(&label_of(&d.signal)),
            d.direction.arrow(),
            d.direction.as_str(),
            d.departure,
            d.contribution
        );
    }
    out.push_str("</tbody></table>");
    out
}

pub fn flag(
    session: &Session,
    study_title: &str,
    record: &FlagRecord,
    related: &[QueueEntry],
    message: Option<(&str, bool)>,
) -> String {
    let p = &record.packet;
    let mut body = String::new();
    if let Some((text, ok)) = message {
        let _ = write!(
            body,
            r#"<p class="{}" role="{}">{}</p>"#,
            if ok { "notice" } else { "error" },
            if ok { "status" } else { "alert" },
            esc(text)
        );
    }
    let _ = write!(
        body,
        r#"<p>{} {} <span class="muted">·</span> {} <span class="muted">· participant</span> <strong>{}</strong> <span class="muted">· episode</span> <strong>{}</strong> <span class="muted">· direction</span> <strong>{}</strong> <span class="muted">· first received {} (server clock; the episode's dates are the participant's local calendar days)</span></p>
<h2>Why this was flagged</h2>
<p class="reason">{}</p>
<p class="muted">{}</p>
{}"#,
        level_badge(p.level),
        status_badge(record.status()),
        esc(p.kind.label()),
        participant_link(&record.study_id, &record.participant),
        esc(&span_text(p.first_day, p.last_day, p.episode.ongoing)),
        esc(&format!(
            "{} ({})",
            direction_text(p.episode.direction),
            involved_text(
                &p.episode
                    .involved
                    .iter()
                    .map(|d| (d.signal.clone(), d.direction))
                    .collect::<Vec<_>>()
            )
        )),
        utc(record.received_ms),
        esc(&p.reason),
        esc(&reason_numbers(record)),
        departures_table(p),
    );
    let flagged_span = [Stretch {
        start: p.first_day,
        end: p.last_day,
        level: p.level,
    }];
    let involved = p.involved_signals();
    let (main, others): (Vec<&SignalWindow>, Vec<&SignalWindow>) = if involved.is_empty() {
        (p.signals.iter().collect(), Vec::new())
    } else {
        p.signals
            .iter()
            .partition(|w| involved.contains(&w.signal.as_str()))
    };
    let _ = write!(
        body,
        "<h2>Trend over the window {} to {} ({} days)</h2>",
        p.window_start,
        p.window_end,
        p.window_days()
    );
    for (i, w) in main.iter().enumerate() {
        match p.episode.involved.iter().find(|d| d.signal == w.signal) {
            Some(d) => {
                let _ = write!(
                    body,
                    "<h3>{} — {} {}, window departure {:+.2} SD</h3>",
                    esc(&label_of(&w.signal)),
                    d.direction.arrow(),
                    d.direction.as_str(),
                    d.departure
                );
            }
            None if main.len() > 1 => {
                let _ = write!(body, "<h3>{}</h3>", esc(&label_of(&w.signal)));
            }
            None => {}
        }
        body.push_str(&chart_block(
            &format!("chart-main-{i}"),
            w,
            p.window_start,
            p.window_end,
            &flagged_span,
            300.0,
        ));
    }
    if !others.is_empty() {
        body.push_str("<h2>The participant's other signals, same window (not in the score)</h2>");
        for (i, w) in others.iter().enumerate() {
            let _ = write!(body, "<h3>{}</h3>", esc(&label_of(&w.signal)));
            body.push_str(&chart_block(
                &format!("chart-other-{i}"),
                w,
                p.window_start,
                p.window_end,
                &flagged_span,
                200.0,
            ));
        }
    }
    if !related.is_empty() {
        body.push_str("<h2>Other episodes of this participant in this window</h2><ul>");
        for e in related {
            let _ = write!(
                body,
                r#"<li><a href="/flag/{}">{} — {}</a> {} {}</li>"#,
                e.packet_id,
                esc(&span_text(e.start, e.end, e.ongoing)),
                esc(&involved_text(&e.involved)),
                level_badge(e.level),
                status_badge(e.status)
            );
        }
        body.push_str("</ul>");
    }

    let _ = write!(
        body,
        r#"<h2 id="review">Review</h2>
<form method="post" action="/flag/{}/action" class="panel" aria-labelledby="review">
<input type="hidden" name="csrf" value="{}">
<p class="muted">Your action applies to the whole episode, including later updates of it from the device.</p>
<label for="note">Note (needed to dismiss or escalate; kept in the audit trail)</label>
<textarea id="note" name="note" maxlength="2000"></textarea>
<div class="actions">
<button type="submit" name="action" value="acknowledge">Acknowledge</button>
<button type="submit" name="action" value="dismiss" class="secondary">Dismiss</button>
<button type="submit" name="action" value="escalate" class="secondary">Escalate</button>
</div>
</form>
<h2>History</h2>"#,
        record.packet_id,
        esc(&session.csrf_token)
    );
    if record.history.is_empty() {
        body.push_str(r#"<p id="history">No review action yet: status <strong>new</strong>.</p>"#);
    } else {
        body.push_str(r#"<table id="history"><caption>Audit trail, oldest first; the latest action is the flag's status</caption><thead><tr><th scope="col">When</th><th scope="col">Reviewer</th><th scope="col">Action</th><th scope="col">Note</th></tr></thead><tbody>"#);
        for a in &record.history {
            let action = match a.action {
                ReviewAction::Acknowledge => "Acknowledged",
                ReviewAction::Dismiss => "Dismissed",
                ReviewAction::Escalate => "Escalated",
            };
            let _ = write!(
                body,
                "<tr><td>{}</td><td>{}</td><td>{action}</td><td>{}</td></tr>",
                utc(a.at_ms),
                esc(&a.reviewer),
                esc(&a.note)
            );
        }
        body.push_str("</tbody></table>");
    }
    let _ = write!(
        body,
        r#"<p><a id="fhir" href="/flag/{}/fhir" download>Download this episode as FHIR R4 (JSON)</a>: the window's daily values as Observations, the episode as a DetectedIssue with the caution, and the review actions as Provenance.</p>"#,
        record.packet_id
    );
    let title = format!(
        "{} — {}, episode {}",
        signal_name(p.signal.as_deref()),
        record.participant,
        span_text(p.first_day, p.last_day, p.episode.ongoing)
    );
    page(
        &title,
        Some(session),
        &[
            ("Studies", "/"),
            (study_title, &format!("/study/{}", record.study_id)),
            (
                "Episode queue",
                &format!("/study/{}/flags", record.study_id),
            ),
            (&format!("Episode {}", record.packet_id), ""),
        ],
        &body,
    )
}

pub fn error(session: Option<&Session>, title: &str, message: &str) -> String {
    page(
        title,
        session,
        &[("Studies", "/")],
        &format!(
            r#"<p role="alert">{}</p><p><a href="/">Back to your studies</a></p>"#,
            esc(message)
        ),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The overview's privacy line: ε spent of the budget. Reference: ε = 4.9918 after 80
    /// rounds at q = 1, z = 5, δ = 1/24, computed with Google's dp-accounting 0.6.0
    /// (`RdpAccountant`, orders 2–256), the package `tests/privacy.rs` checks against.
    #[test]
    fn privacy_fact_states_epsilon_spent_of_the_budget() {
        let mut config: crate::study::StudyConfig = serde_json::from_value(serde_json::json!({
            "study_id": "s", "title": "t",
            "signals": [{"signal": "steps", "param_names": ["mean_z"], "reference_center": 0.0,
                         "reference_scale": 1.0, "initial": [0.0]}],
            "rounds": 80,
            "training": {"optimizer": "sgd", "local_steps": 1, "learning_rate": 1.0,
                         "window_days": 0, "hyperprior_weight_per_day": 0.0},
            "fraction_per_round": 1.0, "min_quorum": 1, "start_when_enrolled": 1,
            "round_deadline_ms": 1000, "selection_seed": 1
        }))
        .unwrap();
        assert_eq!(privacy_fact(&config, 80), "", "no line without dp");
        config.dp = Some(crate::privacy::DpSettings {
            noise_multiplier: 5.0,
            clip_norm: 0.5,
            epsilon_budget: 8.0,
            delta: 1.0 / 24.0,
        });
        let line = privacy_fact(&config, 80);
        assert!(line.contains("ε = 4.99 of 8.00"), "{line}");
        assert!(line.contains("δ = 4.2e-2"), "{line}");
        assert!(!line.contains("Secure aggregation"), "{line}");
        config.secure_aggregation = Some(crate::study::SecureAggregation::default());
        let line = privacy_fact(&config, 80);
        assert!(
            line.contains("<dt>Secure aggregation</dt><dd>on:"),
            "{line}"
        );
    }
}
