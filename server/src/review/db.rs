//! What the review pages read from and append to the aggregator database:
//! study overviews, the episode queue, one episode with its audit trail, and
//! reviewer actions. A flag packet is one episode (its versions replace each
//! other in place), so an action recorded on a packet id applies to the
//! episode, whatever version the device sends next.

use crate::error::{AggregatorError, Result};
use crate::packets::{FlagKind, FlagLevel, FlagPacket, PatternDirection, SignalDirection};
use crate::params;
use crate::store::Store;
use crate::study::{PriorVersion, StudyConfig};

/// Longest note a reviewer may attach to an action, in characters.
pub const MAX_NOTE_CHARS: usize = 2000;

/// What a reviewer did with a flag.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReviewAction {
    Acknowledge,
    Dismiss,
    Escalate,
}

impl ReviewAction {
    pub const ALL: [ReviewAction; 3] = [
        ReviewAction::Acknowledge,
        ReviewAction::Dismiss,
        ReviewAction::Escalate,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            ReviewAction::Acknowledge => "acknowledge",
            ReviewAction::Dismiss => "dismiss",
            ReviewAction::Escalate => "escalate",
        }
    }

    pub fn parse(s: &str) -> Option<ReviewAction> {
        ReviewAction::ALL.into_iter().find(|a| a.as_str() == s)
    }

    /// The status a flag has after this action.
    pub fn status(self) -> ReviewStatus {
        match self {
            ReviewAction::Acknowledge => ReviewStatus::Acknowledged,
            ReviewAction::Dismiss => ReviewStatus::Dismissed,
            ReviewAction::Escalate => ReviewStatus::Escalated,
        }
    }
}

/// A flag's review status: its latest action, or `New` when none.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReviewStatus {
    New,
    Acknowledged,
    Dismissed,
    Escalated,
}

impl ReviewStatus {
    pub const ALL: [ReviewStatus; 4] = [
        ReviewStatus::New,
        ReviewStatus::Escalated,
        ReviewStatus::Acknowledged,
        ReviewStatus::Dismissed,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            ReviewStatus::New => "new",
            ReviewStatus::Acknowledged => "acknowledged",
            ReviewStatus::Dismissed => "dismissed",
            ReviewStatus::Escalated => "escalated",
        }
    }

    pub fn parse(s: &str) -> Option<ReviewStatus> {
        ReviewStatus::ALL.into_iter().find(|a| a.as_str() == s)
    }

    fn from_latest(action: Option<String>) -> ReviewStatus {
        action
            .as_deref()
            .and_then(ReviewAction::parse)
            .map_or(ReviewStatus::New, ReviewAction::status)
    }
}

/// A study as its overview page shows it.
#[derive(Debug, Clone)]
pub struct StudyOverview {
    pub config: StudyConfig,
    pub devices_enrolled: usize,
    pub devices_consenting: usize,
    pub rounds_completed: u32,
    /// Every published prior, oldest first.
    pub priors: Vec<PriorVersion>,
    pub flags_total: usize,
    pub flags_new: usize,
    /// The lead's view: every participant, the review backlog, episodes per week.
    pub participants: Vec<ParticipantRow>,
    pub backlog: Backlog,
    pub weekly: Vec<(chrono::NaiveDate, std::collections::BTreeMap<String, usize>)>,
}

/// One row of the queue: one episode.
#[derive(Debug, Clone, PartialEq)]
pub struct QueueEntry {
    pub packet_id: u64,
    pub participant: String,
    /// The one flagged signal of a migrated single-signal packet.
    pub signal: Option<String>,
    pub kind: FlagKind,
    /// Highest level the episode reached.
    pub level: FlagLevel,
    /// Peak day.
    pub date: String,
    /// Episode start and end so far.
    pub start: chrono::NaiveDate,
    pub end: chrono::NaiveDate,
    pub ongoing: bool,
    /// Involved signals with their direction, largest contribution first.
    pub involved: Vec<(String, SignalDirection)>,
    pub direction: Option<PatternDirection>,
    /// Peak score.
    pub score: f64,
    pub status: ReviewStatus,
    /// Versions of the episode received.
    pub revisions: u32,
    /// A newer version arrived after the latest review action.
    pub updated_since_review: bool,
}

/// Which flags the queue shows; `None` shows all.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct QueueFilter {
    pub signal: Option<String>,
    pub level: Option<FlagLevel>,
    pub status: Option<ReviewStatus>,
}

/// One entry of a flag's audit trail.
#[derive(Debug, Clone, PartialEq)]
pub struct ActionRecord {
    pub reviewer: String,
    pub action: ReviewAction,
    pub note: String,
    pub at_ms: i64,
}

/// A stored episode (its latest version) with what the review knows about it.
#[derive(Debug, Clone)]
pub struct FlagRecord {
    pub packet_id: u64,
    pub study_id: String,
    pub device_id: u64,
    pub participant: String,
    pub packet: FlagPacket,
    /// When the first version arrived.
    pub received_ms: i64,
    /// When the latest version arrived.
    pub updated_ms: i64,
    /// Versions received.
    pub revisions: u32,
    /// Oldest first; the last one is the flag's status.
    pub history: Vec<ActionRecord>,
}

impl FlagRecord {
    pub fn status(&self) -> ReviewStatus {
        self.history
            .last()
            .map_or(ReviewStatus::New, |a| a.action.status())
    }
}

fn corrupt(what: String, e: impl std::fmt::Display) -> AggregatorError {
    AggregatorError::Corrupt(format!("{what}: {e}"))
}

/// The overview of `study_id`, or `None` when no such study exists.
pub fn overview(store: &Store, study_id: &str) -> Result<Option<StudyOverview>> {
    let Some(config) = store
        .studies()?
        .into_iter()
        .find(|s| s.study_id == study_id)
    else {
        return Ok(None);
    };
    let devices = store.devices(study_id)?;
    let (flags_total, flags_new): (i64, i64) = store.db().query_row(
        "SELECT COUNT(*),
                COALESCE(CAST(SUM(CASE WHEN NOT EXISTS
                    (SELECT 1 FROM review_actions a WHERE a.packet_id = p.packet_id)
                    THEN 1 ELSE 0 END) AS BIGINT), 0)
         FROM flag_packets p WHERE p.study_id = ?1",
        &params![study_id],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )?;
    Ok(Some(StudyOverview {
        devices_enrolled: devices.len(),
        devices_consenting: devices.iter().filter(|d| d.consent_share_flags).count(),
        rounds_completed: store.rounds_completed(study_id)?,
        priors: store.priors(study_id)?,
        flags_total: flags_total as usize,
        flags_new: flags_new as usize,
        participants: participants(store, study_id)?,
        backlog: backlog(store, study_id)?,
        weekly: episodes_by_week(store, study_id)?,
        config,
    }))
}

/// Titles of the given studies, in the given order (unknown ids skipped).
pub fn study_titles(store: &Store, ids: &[String]) -> Result<Vec<(String, String)>> {
    let all = store.studies()?;
    Ok(ids
        .iter()
        .filter_map(|id| {
            all.iter()
                .find(|s| &s.study_id == id)
                .map(|s| (id.clone(), s.title.clone()))
        })
        .collect())
}

const LATEST_ACTION: &str = "(SELECT a.action FROM review_actions a
                              WHERE a.packet_id = p.packet_id ORDER BY a.action_id DESC LIMIT 1)";
const LATEST_ACTION_MS: &str = "(SELECT a.at_ms FROM review_actions a
                                 WHERE a.packet_id = p.packet_id ORDER BY a.action_id DESC LIMIT 1)";

/// Columns [`queue_entry`] reads, in order.
fn queue_columns() -> String {
    format!(
        "p.packet_id, d.label, p.payload_json, {LATEST_ACTION}, {LATEST_ACTION_MS},
         p.revisions, COALESCE(p.updated_ms, p.received_ms)"
    )
}

fn queue_entry(r: &crate::db::Row) -> Result<QueueEntry> {
    let packet_id = r.get::<i64>(0)? as u64;
    let payload: String = r.get(2)?;
    let latest_ms: Option<i64> = r.get(4)?;
    let updated_ms: i64 = r.get(6)?;
    let revisions = r.get::<i64>(5)? as u32;
    let status = ReviewStatus::from_latest(r.get(3)?);
    let participant: String = r.get(1)?;
    serde_json::from_str::<FlagPacket>(&payload)
        .map_err(|e| corrupt(format!("flag packet {packet_id}"), e))
        .map(|p| QueueEntry {
            packet_id,
            participant,
            kind: p.kind,
            level: p.level,
            date: p.date.to_string(),
            start: p.first_day,
            end: p.last_day,
            ongoing: p.episode.ongoing,
            involved: match &p.signal {
                Some(s) if p.episode.involved.is_empty() => {
                    vec![(s.clone(), SignalDirection::Up)]
                }
                _ => p
                    .episode
                    .involved
                    .iter()
                    .map(|d| (d.signal.clone(), d.direction))
                    .collect(),
            },
            direction: p.episode.direction,
            score: p.score,
            status,
            revisions,
            // Same millisecond: the order is unknown, so the newer version is assumed unseen
            // (the safe side: the reviewer looks again).
            updated_since_review: latest_ms.is_some_and(|at| at <= updated_ms) && revisions > 1,
            signal: p.signal,
        })
}

/// The study's episodes, Alert before Watch, then newest peak first,
/// filtered (by signal: the episodes that involve it).
pub fn queue(store: &Store, study_id: &str, filter: &QueueFilter) -> Result<Vec<QueueEntry>> {
    let sql = format!(
        "SELECT {}
         FROM flag_packets p JOIN devices d ON d.device_id = p.device_id
         WHERE p.study_id = ?1
         ORDER BY (p.level = 'alert') DESC, p.flag_date DESC, p.packet_id DESC",
        queue_columns()
    );
    let entries = store
        .db()
        .query_map(&sql, &params![study_id], queue_entry)?;
    Ok(entries
        .into_iter()
        .filter(|entry| {
            filter
                .signal
                .as_ref()
                .is_none_or(|s| entry.involved.iter().any(|(i, _)| i == s))
                && filter.level.is_none_or(|l| entry.level == l)
                && filter.status.is_none_or(|s| entry.status == s)
        })
        .collect())
}

/// Signals involved in the study's episodes, sorted (for the queue filter).
pub fn flagged_signals(store: &Store, study_id: &str) -> Result<Vec<String>> {
    let mut signals: Vec<String> = queue(store, study_id, &QueueFilter::default())?
        .into_iter()
        .flat_map(|e| e.involved.into_iter().map(|(s, _)| s))
        .collect();
    signals.sort_unstable();
    signals.dedup();
    Ok(signals)
}

/// One flag with its audit trail, or `None` when it does not exist.
pub fn flag(store: &Store, packet_id: u64) -> Result<Option<FlagRecord>> {
    let db = store.db();
    type Row = (String, i64, String, String, i64, Option<i64>, i64);
    let row: Option<Row> = db.query_opt(
        "SELECT p.study_id, p.device_id, d.label, p.payload_json, p.received_ms,
                p.updated_ms, p.revisions
         FROM flag_packets p JOIN devices d ON d.device_id = p.device_id
         WHERE p.packet_id = ?1",
        &params![packet_id as i64],
        |r| {
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                r.get(3)?,
                r.get(4)?,
                r.get(5)?,
                r.get(6)?,
            ))
        },
    )?;
    let Some((study_id, device_id, participant, payload, received_ms, updated_ms, revisions)) = row
    else {
        return Ok(None);
    };
    let packet: FlagPacket = serde_json::from_str(&payload)
        .map_err(|e| corrupt(format!("flag packet {packet_id}"), e))?;
    let rows = db.query_map(
        "SELECT reviewer, action, note, at_ms FROM review_actions
         WHERE packet_id = ?1 ORDER BY action_id",
        &params![packet_id as i64],
        |r| {
            Ok((
                r.get::<String>(0)?,
                r.get::<String>(1)?,
                r.get::<String>(2)?,
                r.get::<i64>(3)?,
            ))
        },
    )?;
    let mut history = Vec::new();
    for (reviewer, action, note, at_ms) in rows {
        let action = ReviewAction::parse(&action)
            .ok_or_else(|| corrupt(format!("action on flag {packet_id}"), action))?;
        history.push(ActionRecord {
            reviewer,
            action,
            note,
            at_ms,
        });
    }
    Ok(Some(FlagRecord {
        packet_id,
        study_id,
        device_id: device_id as u64,
        participant,
        packet,
        received_ms,
        updated_ms: updated_ms.unwrap_or(received_ms),
        revisions: revisions as u32,
        history,
    }))
}

/// The same participant's other episodes peaking within `record`'s window.
pub fn related_flags(store: &Store, record: &FlagRecord) -> Result<Vec<QueueEntry>> {
    let sql = format!(
        "SELECT {}
         FROM flag_packets p JOIN devices d ON d.device_id = p.device_id
         WHERE p.device_id = ?1 AND p.packet_id <> ?2 AND p.flag_date BETWEEN ?3 AND ?4
         ORDER BY p.flag_date, p.packet_id",
        queue_columns()
    );
    store.db().query_map(
        &sql,
        &params![
            record.device_id as i64,
            record.packet_id as i64,
            record.packet.window_start.to_string(),
            record.packet.window_end.to_string()
        ],
        queue_entry,
    )
}

/// Appends a reviewer's action to an episode's audit trail (it applies to
/// the episode: later versions keep the id and the trail).
pub fn record_action(
    store: &Store,
    packet_id: u64,
    reviewer: &str,
    action: ReviewAction,
    note: &str,
    now_ms: i64,
) -> Result<()> {
    let note = note.trim();
    let note_chars = note.chars().count();
    if note_chars > MAX_NOTE_CHARS {
        return Err(AggregatorError::invalid(
            "note",
            format!("{note_chars} characters; at most {MAX_NOTE_CHARS}"),
        ));
    }
    if note.is_empty() && action != ReviewAction::Acknowledge {
        return Err(AggregatorError::invalid(
            "note",
            format!("a note is needed to {}", action.as_str()),
        ));
    }
    store.db().execute(
        "INSERT INTO review_actions (packet_id, reviewer, action, note, at_ms)
         VALUES (?1, ?2, ?3, ?4, ?5)",
        &params![packet_id as i64, reviewer, action.as_str(), note, now_ms],
    )?;
    Ok(())
}

/// One participant as the study's lead sees them.
#[derive(Debug, Clone)]
pub struct ParticipantRow {
    pub device_id: u64,
    pub label: String,
    pub signals: Vec<String>,
    pub consent_share_flags: bool,
    pub revoked: bool,
    /// The device's latest data summary and when it arrived (server time);
    /// `None` until the device has sent one.
    pub summary: Option<(crate::coverage::DataSummary, i64)>,
    /// Episodes the device sent, and of those not yet reviewed.
    pub episodes: usize,
    pub episodes_new: usize,
}

/// The study's review backlog.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Backlog {
    /// Episodes without any review action.
    pub new: usize,
    /// When the oldest of those first arrived (server time).
    pub oldest_new_ms: Option<i64>,
    /// Reviewed episodes that grew after their latest action.
    pub updated_since_review: usize,
}

/// Every enrolled participant of `study_id`, by label, with their data
/// summary and episode counts.
pub fn participants(store: &Store, study_id: &str) -> Result<Vec<ParticipantRow>> {
    let mut summaries: std::collections::HashMap<u64, (crate::coverage::DataSummary, i64)> = store
        .data_summaries(study_id)?
        .into_iter()
        .map(|(id, s, at)| (id, (s, at)))
        .collect();
    let mut counts: std::collections::HashMap<u64, (usize, usize)> =
        std::collections::HashMap::new();
    for entry in queue_with_devices(store, study_id)? {
        let c = counts.entry(entry.0).or_default();
        c.0 += 1;
        c.1 += usize::from(entry.1.status == ReviewStatus::New);
    }
    let mut devices = store.devices(study_id)?;
    devices.sort_by(|a, b| a.label.cmp(&b.label));
    Ok(devices
        .into_iter()
        .map(|d| {
            let (episodes, episodes_new) = counts.get(&d.device_id).copied().unwrap_or_default();
            ParticipantRow {
                summary: summaries.remove(&d.device_id),
                device_id: d.device_id,
                label: d.label,
                signals: d.signals,
                consent_share_flags: d.consent_share_flags,
                revoked: d.revoked,
                episodes,
                episodes_new,
            }
        })
        .collect())
}

/// The study's episodes with the device each came from.
fn queue_with_devices(store: &Store, study_id: &str) -> Result<Vec<(u64, QueueEntry)>> {
    let sql = format!(
        "SELECT {}, p.device_id
         FROM flag_packets p JOIN devices d ON d.device_id = p.device_id
         WHERE p.study_id = ?1
         ORDER BY p.flag_date DESC, p.packet_id DESC",
        queue_columns()
    );
    store.db().query_map(&sql, &params![study_id], |r| {
        let device = r.get::<i64>(7)? as u64;
        Ok((device, queue_entry(r)?))
    })
}

/// One participant of `study_id` by label with every episode they sent
/// (newest peak first), or `None` when no such participant is enrolled.
pub fn participant(
    store: &Store,
    study_id: &str,
    label: &str,
) -> Result<Option<(ParticipantRow, Vec<QueueEntry>)>> {
    let Some(row) = participants(store, study_id)?
        .into_iter()
        .find(|p| p.label == label)
    else {
        return Ok(None);
    };
    let episodes = queue_with_devices(store, study_id)?
        .into_iter()
        .filter(|(device, _)| *device == row.device_id)
        .map(|(_, e)| e)
        .collect();
    Ok(Some((row, episodes)))
}

/// The study's review backlog.
pub fn backlog(store: &Store, study_id: &str) -> Result<Backlog> {
    let mut b = Backlog::default();
    let sql = format!(
        "SELECT {LATEST_ACTION_MS}, COALESCE(p.updated_ms, p.received_ms), p.received_ms, p.revisions
         FROM flag_packets p WHERE p.study_id = ?1"
    );
    let rows = store.db().query_map(&sql, &params![study_id], |r| {
        Ok((
            r.get::<Option<i64>>(0)?,
            r.get::<i64>(1)?,
            r.get::<i64>(2)?,
            r.get::<i64>(3)?,
        ))
    })?;
    for (latest_action_ms, updated_ms, received_ms, revisions) in rows {
        match latest_action_ms {
            None => {
                b.new += 1;
                b.oldest_new_ms = Some(b.oldest_new_ms.map_or(received_ms, |o| o.min(received_ms)));
            }
            // The same rule as the queue's "updated since review".
            Some(at) if at <= updated_ms && revisions > 1 => b.updated_since_review += 1,
            Some(_) => {}
        }
    }
    Ok(b)
}

/// Episodes per ISO week (the Monday of the week their first day falls in)
/// and involved signal, weeks oldest first; an episode counts once under
/// each signal it involves.
pub fn episodes_by_week(
    store: &Store,
    study_id: &str,
) -> Result<Vec<(chrono::NaiveDate, std::collections::BTreeMap<String, usize>)>> {
    use chrono::Datelike;
    let mut weeks: std::collections::BTreeMap<
        chrono::NaiveDate,
        std::collections::BTreeMap<String, usize>,
    > = std::collections::BTreeMap::new();
    for (_, e) in queue_with_devices(store, study_id)? {
        let monday =
            e.start - chrono::Days::new(u64::from(e.start.weekday().num_days_from_monday()));
        let week = weeks.entry(monday).or_default();
        for (signal, _) in &e.involved {
            *week.entry(signal.clone()).or_default() += 1;
        }
    }
    Ok(weeks.into_iter().collect())
}
