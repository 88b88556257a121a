//! The aggregator's durable state in an embedded SQLite database.
//!
//! Every state change a round goes through is one transaction, so a crash
//! leaves either the old state or the new one (SQLite's atomic commit, WAL
//! mode). `synchronous=NORMAL`: in WAL mode a commit survives a crash of
//! the process (the crash test kills it with SIGKILL); only an OS crash or
//! power loss may roll back the last commits (SQLite docs, "PRAGMA
//! synchronous"). Measured: about 2× the submissions per second of `FULL`.
//!
//! Federated training stores no raw observation: only study configuration, enrolment, round membership, submitted parameter
//! vectors with their day counts and losses, published priors, and the
//! detector's calibration sums and counts (never a daily value). The one
//! place observed values are kept is `flag_packets`, filled only from devices
//! whose participant consented to share flags (see [`crate::packets`]).
//!
//! Schema versions: 1 is the federated-training schema; 2 adds the recorded
//! consent on `devices`, flag packets, and the review tables (reviewers,
//! their study assignments, sessions, and the append-only action log);
//! 3 adds enrollment codes, device credentials and revocation; 4 adds the
//! detector's calibration statistics (per-device submissions and each
//! stage's published sum, see [`crate::detection`]); 5 makes every flag
//! packet an episode (`MIGRATE_EPISODES`); 6 adds the review pages'
//! append-only login record (`MIGRATE_LOGIN_EVENTS`, see
//! [`crate::review::limits`]). Opening an older database migrates it in one
//! transaction.

use std::collections::BTreeMap;
use std::path::Path;

use rusqlite::{Connection, OptionalExtension};

use crate::db::{Db, Dialect, is_postgres_url};
use crate::params;

use crate::detection::{DetectionStage, DetectionStats};
use crate::error::{AggregatorError, Result};
use crate::packets::FlagPacket;
use crate::study::{PriorVersion, SignalUpdate, StudyConfig};

const SCHEMA_VERSION: i64 = 8;

/// Version 1: federated training.
const SCHEMA_V1: &str = "
CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL);
CREATE TABLE IF NOT EXISTS studies (
    study_id    TEXT PRIMARY KEY,
    config_json TEXT NOT NULL,
    created_ms  INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS devices (
    device_id    INTEGER PRIMARY KEY AUTOINCREMENT,
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    label        TEXT NOT NULL,
    signals_json TEXT NOT NULL,
    enrolled_ms  INTEGER NOT NULL,
    UNIQUE (study_id, label)
);
CREATE TABLE IF NOT EXISTS rounds (
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    round_id     INTEGER NOT NULL,
    state        TEXT NOT NULL CHECK (state IN ('open', 'closed', 'abandoned')),
    opened_ms    INTEGER NOT NULL,
    deadline_ms  INTEGER NOT NULL,
    closed_ms    INTEGER,
    base_version INTEGER NOT NULL,
    PRIMARY KEY (study_id, round_id)
);
CREATE TABLE IF NOT EXISTS round_members (
    study_id  TEXT NOT NULL,
    round_id  INTEGER NOT NULL,
    device_id INTEGER NOT NULL REFERENCES devices(device_id),
    PRIMARY KEY (study_id, round_id, device_id),
    FOREIGN KEY (study_id, round_id) REFERENCES rounds(study_id, round_id)
);
CREATE TABLE IF NOT EXISTS updates (
    study_id     TEXT NOT NULL,
    round_id     INTEGER NOT NULL,
    device_id    INTEGER NOT NULL REFERENCES devices(device_id),
    payload_json TEXT NOT NULL,
    received_ms  INTEGER NOT NULL,
    PRIMARY KEY (study_id, round_id, device_id),
    FOREIGN KEY (study_id, round_id) REFERENCES rounds(study_id, round_id)
);
CREATE TABLE IF NOT EXISTS priors (
    study_id           TEXT NOT NULL REFERENCES studies(study_id),
    version            INTEGER NOT NULL,
    round_id           INTEGER NOT NULL,
    params_json        TEXT NOT NULL,
    contributions_json TEXT NOT NULL,
    created_ms         INTEGER NOT NULL,
    PRIMARY KEY (study_id, version)
);
";

/// Version 1 → 2: consent, flag packets and clinician review.
const MIGRATE_V1_TO_V2: &str = "
ALTER TABLE devices ADD COLUMN consent_share_flags INTEGER NOT NULL DEFAULT 0;
CREATE TABLE flag_packets (
    packet_id    INTEGER PRIMARY KEY AUTOINCREMENT,
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    device_id    INTEGER NOT NULL REFERENCES devices(device_id),
    signal       TEXT NOT NULL,
    kind         TEXT NOT NULL,
    level        TEXT NOT NULL CHECK (level IN ('watch', 'alert')),
    flag_date    TEXT NOT NULL,
    payload_json TEXT NOT NULL,
    received_ms  INTEGER NOT NULL,
    UNIQUE (device_id, signal, kind, flag_date)
);
CREATE INDEX flag_packets_by_study ON flag_packets (study_id, flag_date);
CREATE TABLE reviewers (
    name          TEXT PRIMARY KEY,
    password_hash TEXT NOT NULL,
    created_ms    INTEGER NOT NULL
);
CREATE TABLE reviewer_studies (
    name     TEXT NOT NULL REFERENCES reviewers(name),
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    PRIMARY KEY (name, study_id)
);
CREATE TABLE review_sessions (
    token_hash TEXT PRIMARY KEY,
    reviewer   TEXT NOT NULL REFERENCES reviewers(name),
    csrf_token TEXT NOT NULL,
    created_ms INTEGER NOT NULL,
    expires_ms INTEGER NOT NULL
);
CREATE TABLE review_actions (
    action_id INTEGER PRIMARY KEY AUTOINCREMENT,
    packet_id INTEGER NOT NULL REFERENCES flag_packets(packet_id),
    reviewer  TEXT NOT NULL REFERENCES reviewers(name),
    action    TEXT NOT NULL CHECK (action IN ('acknowledge', 'dismiss', 'escalate')),
    note      TEXT NOT NULL,
    at_ms     INTEGER NOT NULL
);
CREATE TRIGGER review_actions_append_only_update BEFORE UPDATE ON review_actions
BEGIN SELECT RAISE(ABORT, 'review_actions is append-only'); END;
CREATE TRIGGER review_actions_append_only_delete BEFORE DELETE ON review_actions
BEGIN SELECT RAISE(ABORT, 'review_actions is append-only'); END;
UPDATE schema_version SET version = 2;
";

/// Version 2 → 3: enrollment codes, device credentials and revocation.
/// Studies and devices from before have no code or credential: a study
/// takes enrolments again once `enrollment-code` gives it a code, and an
/// enrolled device without a credential sets one by enrolling again.
const MIGRATE_V2_TO_V3: &str = "
ALTER TABLE studies ADD COLUMN enrollment_code_hash TEXT;
ALTER TABLE devices ADD COLUMN credential_hash TEXT;
ALTER TABLE devices ADD COLUMN revoked_ms INTEGER;
UPDATE schema_version SET version = 3;
";

/// Version 3 → 4: the detector's calibration statistics. One row per
/// device and stage in `detection_stats` (replaced when the device submits
/// again while the stage is open); one row per completed stage in
/// `detection_stages` with the published sum, written in the same
/// transaction as the submission that completed it (or by the deadline
/// check).
const MIGRATE_V3_TO_V4: &str = "
CREATE TABLE detection_stats (
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    stage        TEXT NOT NULL CHECK (stage IN ('residual_moments', 'episode_histogram')),
    device_id    INTEGER NOT NULL REFERENCES devices(device_id),
    payload_json TEXT NOT NULL,
    received_ms  INTEGER NOT NULL,
    PRIMARY KEY (study_id, stage, device_id)
);
CREATE TABLE detection_stages (
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    stage        TEXT NOT NULL CHECK (stage IN ('residual_moments', 'episode_histogram')),
    completed_ms INTEGER NOT NULL,
    n_devices    INTEGER NOT NULL,
    sum_json     TEXT NOT NULL,
    PRIMARY KEY (study_id, stage)
);
UPDATE schema_version SET version = 4;
";

/// What [`Store::close_round`] did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Closing {
    /// Closed, and the prior published.
    Closed,
    /// The round was no longer open: another process closed or abandoned it.
    NotOpen,
    /// Another process stored a submission since the prior was computed: compute again.
    Stale,
}

/// See [`Store::study_stamp`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StudyStamp([i64; 6]);

impl StudyStamp {
    /// The device terms: how many devices, how many revoked, and the sum of the ids of the
    /// devices that consent to share flag packets (a sum, not a count, so that one device
    /// withdrawing consent while another gives it still changes the stamp).
    pub fn devices(&self) -> [i64; 3] {
        [self.0[2], self.0[3], self.0[4]]
    }

    /// The same stamp with other device terms.
    #[must_use]
    pub fn with_devices(mut self, devices: [i64; 3]) -> Self {
        self.0[2..5].copy_from_slice(&devices);
        self
    }
}

/// A completed calibration stage as stored.
#[derive(Debug, Clone, PartialEq)]
pub struct CompletedStage {
    pub completed_ms: i64,
    pub n_devices: u32,
    pub sum: DetectionStats,
    /// Per level of the study's group column, the devices and sum of that group's
    /// submissions (histogram stage of a study that calibrates per group; empty otherwise).
    pub group_sums: BTreeMap<String, (u32, DetectionStats)>,
}

/// Version 4 → 5: flag packets become episodes, one row per episode.
///
/// Each stored packet becomes **one episode of one alarm day** (its flag
/// day), keyed `legacy-<packet id>`; packets are not grouped. Grouping by the
/// episode rule would merge packets from different day-by-day detectors that
/// reviewers acted on one by one, and their audit trails with them; kept
/// apart, every packet keeps its id, its review actions and its status.
/// The old packet's stretch is the episode's span (`first_day`..`last_day`),
/// its flag day the peak, its score the peak score. A single-signal packet
/// names its signal as the one involved, its direction the sign of the old
/// statistic and no pattern direction (the old detectors had none); a
/// multi-signal packet keeps the target direction and no per-signal
/// departures (it did not record them).
///
/// New columns: `episode_key` (unique per device), `updated_ms` (last
/// version received) and `revisions` (versions received).
const MIGRATE_EPISODES: &str = "
ALTER TABLE flag_packets ADD COLUMN episode_key TEXT;
ALTER TABLE flag_packets ADD COLUMN updated_ms INTEGER;
ALTER TABLE flag_packets ADD COLUMN revisions INTEGER NOT NULL DEFAULT 1;
UPDATE flag_packets SET
    episode_key = 'legacy-' || packet_id,
    updated_ms = received_ms,
    payload_json = json_set(payload_json, '$.episode', json_object(
        'key', 'legacy-' || packet_id,
        'ongoing', json('false'),
        'direction', CASE kind WHEN 'multi_signal' THEN 'target' ELSE NULL END,
        'involved', CASE WHEN signal = '' THEN json_array() ELSE json_array(json_object(
            'signal', signal,
            'direction', CASE WHEN json_extract(payload_json, '$.score') < 0
                              THEN 'down' ELSE 'up' END,
            'departure', json_extract(payload_json, '$.score'),
            'contribution', json_extract(payload_json, '$.score'))) END,
        'peak_window_start', json_extract(payload_json, '$.first_day'),
        'alarm_days', 1));
CREATE UNIQUE INDEX flag_packets_by_episode ON flag_packets (device_id, episode_key);
UPDATE schema_version SET version = 5;
";

/// Version 5 → 6: the review pages' login record, append-only like
/// `review_actions`: failed sign-ins, lockouts and successful sign-ins with
/// the name typed (at most 64 characters) and the source address.
const MIGRATE_LOGIN_EVENTS: &str = "
CREATE TABLE review_login_events (
    event_id INTEGER PRIMARY KEY AUTOINCREMENT,
    at_ms    INTEGER NOT NULL,
    name     TEXT NOT NULL,
    source   TEXT NOT NULL,
    event    TEXT NOT NULL CHECK (event IN ('failure', 'lockout', 'success')),
    detail   TEXT NOT NULL
);
CREATE TRIGGER review_login_events_append_only_update BEFORE UPDATE ON review_login_events
BEGIN SELECT RAISE(ABORT, 'review_login_events is append-only'); END;
CREATE TRIGGER review_login_events_append_only_delete BEFORE DELETE ON review_login_events
BEGIN SELECT RAISE(ABORT, 'review_login_events is append-only'); END;
UPDATE schema_version SET version = 6;
";

/// Version 6 → 7: each device's latest data-completeness summary
/// ([`crate::coverage::DataSummary`]): counts and dates, never a value.
const MIGRATE_DATA_SUMMARIES: &str = "
CREATE TABLE data_summaries (
    device_id    INTEGER PRIMARY KEY REFERENCES devices(device_id),
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    payload_json TEXT NOT NULL,
    received_ms  INTEGER NOT NULL
);
CREATE INDEX data_summaries_by_study ON data_summaries (study_id);
UPDATE schema_version SET version = 7;
";

/// Version 8: a device's sensor model and group level (declared at enrolment), a prior's
/// per-sensor-model terms, and a completed histogram stage's sums per group.
const MIGRATE_SUBGROUPS: &str = "
ALTER TABLE devices ADD COLUMN sensor_model TEXT;
ALTER TABLE devices ADD COLUMN group_label TEXT;
ALTER TABLE priors ADD COLUMN sensor_terms_json TEXT NOT NULL DEFAULT '[]';
ALTER TABLE detection_stages ADD COLUMN group_sums_json TEXT NOT NULL DEFAULT '{}';
UPDATE schema_version SET version = 8;
";

/// A stored episode: its id (the same for every version) and how many
/// versions were received.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StoredEpisode {
    pub packet_id: u64,
    pub revisions: u32,
}

/// A device to insert ([`Store::insert_device`]).
#[derive(Debug, Clone, Copy)]
pub struct NewDevice<'a> {
    pub study_id: &'a str,
    pub label: &'a str,
    pub signals: &'a [String],
    pub consent_share_flags: bool,
    /// Hex SHA-256 of the device secret.
    pub credential_hash: &'a str,
    pub sensor_model: Option<&'a str>,
    pub group: Option<&'a str>,
}

/// Who a device is, as the credential check needs it.
#[derive(Debug, Clone, PartialEq)]
pub struct DeviceIdentity {
    pub study_id: String,
    pub label: String,
    /// Hex SHA-256 of the device secret; `None` for a device enrolled before
    /// credentials existed (schema 2), which must enrol again.
    pub credential_hash: Option<String>,
    /// When the device was revoked (Unix ms), if it was.
    pub revoked_ms: Option<i64>,
}

/// A device as stored.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredDevice {
    pub device_id: u64,
    pub label: String,
    pub signals: Vec<String>,
    /// The participant's recorded consent to share flag packets.
    pub consent_share_flags: bool,
    /// True once the device was revoked.
    pub revoked: bool,
    /// Declared sensor model, if the study collects one.
    pub sensor_model: Option<String>,
    /// Level of the study's group column, if it collects one.
    pub group: Option<String>,
}

/// The round that was open when the state was last written.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredOpenRound {
    pub round_id: u64,
    pub deadline_ms: i64,
    pub members: Vec<u64>,
    pub submissions: Vec<(u64, Vec<SignalUpdate>)>,
}

/// Handle on the aggregator database: embedded SQLite, or PostgreSQL for a
/// study served by several aggregator processes ([`crate::db`]).
#[derive(Debug)]
pub struct Store {
    db: Db,
    identities: IdentityCache,
}

/// Devices' identities as [`Store::device_identity`] last read them, so the credential check
/// of every call does not read the database (it was a tenth of the aggregator's time per
/// update under load).
///
/// Only on SQLite. The cache holds while `PRAGMA data_version` stays the same, which it does
/// until another connection commits (SQLite's documentation of `data_version`): a device
/// revoked by `plimsoll-aggregator device revoke` in another process is seen at the next check.
/// This connection's own changes to `devices` empty it. On PostgreSQL nothing is kept: other
/// aggregators change the table, and there is no such cheap check.
///
/// The first miss after the cache was emptied reads every device's identity in one statement
/// (up to [`MAX_CACHED_IDENTITIES`]): after a start, or after another process committed, each
/// device's first call would otherwise read its own row (under load, at the start of a round,
/// that was most calls). Later misses read the one row, as a device enrolled since may be asked
/// for.
#[derive(Debug, Default)]
struct IdentityCache {
    /// `data_version` when the entries were read.
    version: Option<i64>,
    by_id: std::collections::HashMap<u64, DeviceIdentity>,
    /// Whether every device (up to the cap) was read since the cache was last emptied.
    filled: bool,
}

impl IdentityCache {
    fn clear(&mut self) {
        self.by_id.clear();
        self.filled = false;
    }
}

/// Most identities kept; past it the cache starts again (a study has far fewer devices).
const MAX_CACHED_IDENTITIES: usize = 200_000;

fn corrupt(what: &str, e: impl std::fmt::Display) -> AggregatorError {
    AggregatorError::Corrupt(format!("{what}: {e}"))
}

fn to_json<T: serde::Serialize>(value: &T) -> String {
    serde_json::to_string(value).expect("domain types serialise to JSON")
}

/// Today's schema (version 8) in PostgreSQL's dialect: the tables, keys and
/// checks of the SQLite schema after every migration, integers as `BIGINT`,
/// ids as identity columns, names sorted byte-wise as SQLite sorts them
/// (`COLLATE "C"`, whatever the database's locale), and the append-only rule
/// as one trigger function (which also refuses `TRUNCATE`). A PostgreSQL store starts at version 8;
/// there are no older PostgreSQL databases to migrate.
const POSTGRES_SCHEMA: &str = "
CREATE TABLE schema_version (version BIGINT NOT NULL);
CREATE TABLE studies (
    study_id             TEXT COLLATE \"C\" PRIMARY KEY,
    config_json          TEXT NOT NULL,
    created_ms           BIGINT NOT NULL,
    enrollment_code_hash TEXT
);
CREATE TABLE devices (
    device_id           BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
    study_id            TEXT NOT NULL REFERENCES studies(study_id),
    label               TEXT COLLATE \"C\" NOT NULL,
    signals_json        TEXT NOT NULL,
    enrolled_ms         BIGINT NOT NULL,
    consent_share_flags BIGINT NOT NULL DEFAULT 0,
    credential_hash     TEXT,
    revoked_ms          BIGINT,
    sensor_model        TEXT,
    group_label         TEXT,
    UNIQUE (study_id, label)
);
CREATE TABLE rounds (
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    round_id     BIGINT NOT NULL,
    state        TEXT NOT NULL CHECK (state IN ('open', 'closed', 'abandoned')),
    opened_ms    BIGINT NOT NULL,
    deadline_ms  BIGINT NOT NULL,
    closed_ms    BIGINT,
    base_version BIGINT NOT NULL,
    PRIMARY KEY (study_id, round_id)
);
CREATE TABLE round_members (
    study_id  TEXT NOT NULL,
    round_id  BIGINT NOT NULL,
    device_id BIGINT NOT NULL REFERENCES devices(device_id),
    PRIMARY KEY (study_id, round_id, device_id),
    FOREIGN KEY (study_id, round_id) REFERENCES rounds(study_id, round_id)
);
CREATE TABLE updates (
    study_id     TEXT NOT NULL,
    round_id     BIGINT NOT NULL,
    device_id    BIGINT NOT NULL REFERENCES devices(device_id),
    payload_json TEXT NOT NULL,
    received_ms  BIGINT NOT NULL,
    PRIMARY KEY (study_id, round_id, device_id),
    FOREIGN KEY (study_id, round_id) REFERENCES rounds(study_id, round_id)
);
CREATE TABLE priors (
    study_id           TEXT NOT NULL REFERENCES studies(study_id),
    version            BIGINT NOT NULL,
    round_id           BIGINT NOT NULL,
    params_json        TEXT NOT NULL,
    contributions_json TEXT NOT NULL,
    created_ms         BIGINT NOT NULL,
    sensor_terms_json  TEXT NOT NULL DEFAULT '[]',
    PRIMARY KEY (study_id, version)
);
CREATE TABLE flag_packets (
    packet_id    BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    device_id    BIGINT NOT NULL REFERENCES devices(device_id),
    signal       TEXT NOT NULL,
    kind         TEXT NOT NULL,
    level        TEXT NOT NULL CHECK (level IN ('watch', 'alert')),
    flag_date    TEXT NOT NULL,
    payload_json TEXT NOT NULL,
    received_ms  BIGINT NOT NULL,
    episode_key  TEXT,
    updated_ms   BIGINT,
    revisions    BIGINT NOT NULL DEFAULT 1,
    UNIQUE (device_id, signal, kind, flag_date)
);
CREATE INDEX flag_packets_by_study ON flag_packets (study_id, flag_date);
CREATE UNIQUE INDEX flag_packets_by_episode ON flag_packets (device_id, episode_key);
CREATE TABLE reviewers (
    name          TEXT COLLATE \"C\" PRIMARY KEY,
    password_hash TEXT NOT NULL,
    created_ms    BIGINT NOT NULL
);
CREATE TABLE reviewer_studies (
    name     TEXT COLLATE \"C\" NOT NULL REFERENCES reviewers(name),
    study_id TEXT COLLATE \"C\" NOT NULL REFERENCES studies(study_id),
    PRIMARY KEY (name, study_id)
);
CREATE TABLE review_sessions (
    token_hash TEXT PRIMARY KEY,
    reviewer   TEXT NOT NULL REFERENCES reviewers(name),
    csrf_token TEXT NOT NULL,
    created_ms BIGINT NOT NULL,
    expires_ms BIGINT NOT NULL
);
CREATE TABLE review_actions (
    action_id BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
    packet_id BIGINT NOT NULL REFERENCES flag_packets(packet_id),
    reviewer  TEXT NOT NULL REFERENCES reviewers(name),
    action    TEXT NOT NULL CHECK (action IN ('acknowledge', 'dismiss', 'escalate')),
    note      TEXT NOT NULL,
    at_ms     BIGINT NOT NULL
);
CREATE TABLE detection_stats (
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    stage        TEXT NOT NULL CHECK (stage IN ('residual_moments', 'episode_histogram')),
    device_id    BIGINT NOT NULL REFERENCES devices(device_id),
    payload_json TEXT NOT NULL,
    received_ms  BIGINT NOT NULL,
    PRIMARY KEY (study_id, stage, device_id)
);
CREATE TABLE detection_stages (
    study_id        TEXT NOT NULL REFERENCES studies(study_id),
    stage           TEXT NOT NULL CHECK (stage IN ('residual_moments', 'episode_histogram')),
    completed_ms    BIGINT NOT NULL,
    n_devices       BIGINT NOT NULL,
    sum_json        TEXT NOT NULL,
    group_sums_json TEXT NOT NULL DEFAULT '{}',
    PRIMARY KEY (study_id, stage)
);
CREATE TABLE review_login_events (
    event_id BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
    at_ms    BIGINT NOT NULL,
    name     TEXT NOT NULL,
    source   TEXT NOT NULL,
    event    TEXT NOT NULL CHECK (event IN ('failure', 'lockout', 'success')),
    detail   TEXT NOT NULL
);
CREATE TABLE data_summaries (
    device_id    BIGINT PRIMARY KEY REFERENCES devices(device_id),
    study_id     TEXT NOT NULL REFERENCES studies(study_id),
    payload_json TEXT NOT NULL,
    received_ms  BIGINT NOT NULL
);
CREATE INDEX data_summaries_by_study ON data_summaries (study_id);
CREATE FUNCTION plimsoll_append_only() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION '% is append-only', TG_TABLE_NAME;
END
$$;
CREATE TRIGGER review_actions_append_only BEFORE UPDATE OR DELETE ON review_actions
    FOR EACH ROW EXECUTE FUNCTION plimsoll_append_only();
CREATE TRIGGER review_actions_no_truncate BEFORE TRUNCATE ON review_actions
    FOR EACH STATEMENT EXECUTE FUNCTION plimsoll_append_only();
CREATE TRIGGER review_login_events_append_only BEFORE UPDATE OR DELETE ON review_login_events
    FOR EACH ROW EXECUTE FUNCTION plimsoll_append_only();
CREATE TRIGGER review_login_events_no_truncate BEFORE TRUNCATE ON review_login_events
    FOR EACH STATEMENT EXECUTE FUNCTION plimsoll_append_only();
INSERT INTO schema_version (version) VALUES (8);
";

/// The key of the advisory lock under which a PostgreSQL store is created,
/// so that replicas starting together create it once (an arbitrary constant).
const POSTGRES_SCHEMA_LOCK: i64 = 0x706c_696d_736f;

impl Store {
    /// Opens (creating if needed) the database at `location`: a SQLite file,
    /// or a PostgreSQL database named by a `postgres://` URL.
    pub fn open(location: &Path) -> Result<Store> {
        match location.to_str().filter(|l| is_postgres_url(l)) {
            Some(url) => Self::open_postgres(url),
            None => Self::init(Connection::open(location)?),
        }
    }

    /// An in-memory database, for tests.
    pub fn in_memory() -> Result<Store> {
        Self::init(Connection::open_in_memory()?)
    }

    /// Connects to PostgreSQL at `url` and creates today's schema when the
    /// database has none (under an advisory lock: replicas starting at once
    /// create it once).
    pub fn open_postgres(url: &str) -> Result<Store> {
        let mut db = Db::postgres(url)?;
        let tx = db.transaction()?;
        tx.execute(
            "SELECT pg_advisory_xact_lock(?1)",
            &params![POSTGRES_SCHEMA_LOCK],
        )?;
        let exists = tx.query_row(
            "SELECT to_regclass('schema_version') IS NOT NULL",
            &params![],
            |r| r.get::<bool>(0),
        )?;
        if !exists {
            tracing::info!(
                "creating the aggregator schema (version {SCHEMA_VERSION}) in PostgreSQL"
            );
            tx.execute_batch(POSTGRES_SCHEMA)?;
        }
        let version = tx.query_row("SELECT version FROM schema_version", &params![], |r| {
            r.get::<i64>(0)
        })?;
        if version != SCHEMA_VERSION {
            return Err(AggregatorError::Corrupt(format!(
                "database schema version {version}, this build reads PostgreSQL schema {SCHEMA_VERSION}"
            )));
        }
        tx.commit()?;
        Ok(Store {
            db,
            identities: IdentityCache::default(),
        })
    }

    fn init(conn: Connection) -> Result<Store> {
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "NORMAL")?;
        conn.pragma_update(None, "foreign_keys", "ON")?;
        conn.busy_timeout(std::time::Duration::from_secs(5))?;
        let mut conn = conn;
        // IMMEDIATE: two components opening the same file at once migrate it
        // once; the second waits (busy timeout) and then sees the new version.
        let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        tx.execute_batch(SCHEMA_V1)?;
        let version: Option<i64> = tx
            .query_row("SELECT version FROM schema_version", [], |r| r.get(0))
            .optional()?;
        match version {
            None => {
                tx.execute("INSERT INTO schema_version (version) VALUES (1)", [])?;
                tx.execute_batch(MIGRATE_V1_TO_V2)?;
                tx.execute_batch(MIGRATE_V2_TO_V3)?;
                tx.execute_batch(MIGRATE_V3_TO_V4)?;
                tx.execute_batch(MIGRATE_EPISODES)?;
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(1) => {
                tracing::info!("migrating the aggregator database from schema 1 to 8");
                tx.execute_batch(MIGRATE_V1_TO_V2)?;
                tx.execute_batch(MIGRATE_V2_TO_V3)?;
                tx.execute_batch(MIGRATE_V3_TO_V4)?;
                tx.execute_batch(MIGRATE_EPISODES)?;
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(2) => {
                tracing::info!("migrating the aggregator database from schema 2 to 8");
                tx.execute_batch(MIGRATE_V2_TO_V3)?;
                tx.execute_batch(MIGRATE_V3_TO_V4)?;
                tx.execute_batch(MIGRATE_EPISODES)?;
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(3) => {
                tracing::info!("migrating the aggregator database from schema 3 to 8");
                tx.execute_batch(MIGRATE_V3_TO_V4)?;
                tx.execute_batch(MIGRATE_EPISODES)?;
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(4) => {
                tracing::info!(
                    "migrating the aggregator database from schema 4 to 8 (episodes, login record, data summaries, sensor models and groups)"
                );
                tx.execute_batch(MIGRATE_EPISODES)?;
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(5) => {
                tracing::info!(
                    "migrating the aggregator database from schema 5 to 8 (login record, data summaries, sensor models and groups)"
                );
                tx.execute_batch(MIGRATE_LOGIN_EVENTS)?;
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(6) => {
                tracing::info!(
                    "migrating the aggregator database from schema 6 to 8 (data summaries, sensor models and groups)"
                );
                tx.execute_batch(MIGRATE_DATA_SUMMARIES)?;
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(7) => {
                tracing::info!(
                    "migrating the aggregator database from schema 7 to 8 (sensor models and groups)"
                );
                tx.execute_batch(MIGRATE_SUBGROUPS)?;
            }
            Some(SCHEMA_VERSION) => {}
            Some(other) => {
                return Err(AggregatorError::Corrupt(format!(
                    "database schema version {other}, this build reads 1 to {SCHEMA_VERSION}"
                )));
            }
        }
        tx.commit()?;
        Ok(Store {
            db: Db::sqlite(conn),
            identities: IdentityCache::default(),
        })
    }

    /// The schema version of the open database.
    pub fn schema_version(&self) -> Result<i64> {
        self.db
            .query_row("SELECT version FROM schema_version", &params![], |r| {
                r.get(0)
            })
    }

    /// Which database this store is on.
    pub fn dialect(&self) -> Dialect {
        self.db.dialect()
    }

    /// The underlying connection, for the review module's queries.
    pub(crate) fn db(&self) -> &Db {
        &self.db
    }

    pub(crate) fn db_mut(&mut self) -> &mut Db {
        &mut self.db
    }

    /// Creates a study with its initial prior (version 0) and the hash of
    /// its enrollment code in one transaction.
    pub fn create_study(
        &mut self,
        config: &StudyConfig,
        initial: &PriorVersion,
        enrollment_code_hash: &str,
        now_ms: i64,
    ) -> Result<()> {
        let tx = self.db.transaction()?;
        tx.execute(
            "INSERT INTO studies (study_id, config_json, created_ms, enrollment_code_hash)
             VALUES (?1, ?2, ?3, ?4)",
            &params![
                config.study_id,
                to_json(config),
                now_ms,
                enrollment_code_hash
            ],
        )?;
        insert_prior(&tx, &config.study_id, initial)?;
        tx.commit()?;
        Ok(())
    }

    pub fn studies(&self) -> Result<Vec<StudyConfig>> {
        let rows = self.db.query_map(
            "SELECT study_id, config_json FROM studies ORDER BY study_id",
            &params![],
            |r| Ok((r.get::<String>(0)?, r.get::<String>(1)?)),
        )?;
        let mut out = Vec::new();
        for (id, json) in rows {
            out.push(serde_json::from_str(&json).map_err(|e| corrupt(&format!("study {id}"), e))?);
        }
        Ok(out)
    }

    /// The hash of a study's enrollment code; `None` when the study has no
    /// code (created before codes existed) or does not exist.
    pub fn enrollment_code_hash(&self, study_id: &str) -> Result<Option<String>> {
        Ok(self
            .db
            .query_opt(
                "SELECT enrollment_code_hash FROM studies WHERE study_id = ?1",
                &params![study_id],
                |r| r.get::<Option<String>>(0),
            )?
            .flatten())
    }

    /// Replaces a study's stored settings (same study id); false when there is no such study.
    pub fn update_study_config(&mut self, config: &StudyConfig) -> Result<bool> {
        Ok(self.db.execute(
            "UPDATE studies SET config_json = ?2 WHERE study_id = ?1",
            &params![config.study_id, to_json(config)],
        )? == 1)
    }

    /// Replaces a study's enrollment code hash; false when there is no such
    /// study.
    pub fn set_enrollment_code_hash(&mut self, study_id: &str, hash: &str) -> Result<bool> {
        Ok(self.db.execute(
            "UPDATE studies SET enrollment_code_hash = ?2 WHERE study_id = ?1",
            &params![study_id, hash],
        )? == 1)
    }

    pub fn devices(&self, study_id: &str) -> Result<Vec<StoredDevice>> {
        self.devices_after(study_id, 0)
    }

    /// The ids of the study's devices, in order.
    pub fn device_ids(&self, study_id: &str) -> Result<Vec<u64>> {
        self.db.query_map(
            "SELECT device_id FROM devices WHERE study_id = ?1 ORDER BY device_id",
            &params![study_id],
            |r| r.get::<i64>(0).map(|id| id as u64),
        )
    }

    /// The study's devices whose id is greater than `after` (ids start at 1), in id order.
    pub fn devices_after(&self, study_id: &str, after: u64) -> Result<Vec<StoredDevice>> {
        let rows = self.db.query_map(
            "SELECT device_id, label, signals_json, consent_share_flags, revoked_ms,
                    sensor_model, group_label
             FROM devices WHERE study_id = ?1 AND device_id > ?2 ORDER BY device_id",
            &params![study_id, i64::try_from(after).unwrap_or(i64::MAX)],
            |r| {
                Ok((
                    r.get::<i64>(0)?,
                    r.get::<String>(1)?,
                    r.get::<String>(2)?,
                    r.get::<bool>(3)?,
                    r.get::<Option<i64>>(4)?,
                    r.get::<Option<String>>(5)?,
                    r.get::<Option<String>>(6)?,
                ))
            },
        )?;
        let mut out = Vec::new();
        for (id, label, json, consent_share_flags, revoked_ms, sensor_model, group) in rows {
            let signals = serde_json::from_str(&json)
                .map_err(|e| corrupt(&format!("device {id} signals"), e))?;
            out.push(StoredDevice {
                device_id: id as u64,
                label,
                signals,
                consent_share_flags,
                revoked: revoked_ms.is_some(),
                sensor_model,
                group,
            });
        }
        Ok(out)
    }

    /// The identity of `device_id`: from the identity cache when it holds the device, else
    /// read from the database (and cached on SQLite). Call
    /// [`Store::refresh_identities`] first to drop entries another process may have changed.
    pub fn device_identity(&mut self, device_id: u64) -> Result<Option<DeviceIdentity>> {
        if let Some(identity) = self.identities.by_id.get(&device_id) {
            return Ok(Some(identity.clone()));
        }
        if self.db.dialect() != Dialect::Sqlite {
            return self.read_device_identity(device_id);
        }
        if !self.identities.filled {
            self.identities.by_id = self.read_all_device_identities()?;
            self.identities.filled = true;
            if let Some(identity) = self.identities.by_id.get(&device_id) {
                return Ok(Some(identity.clone()));
            }
        }
        let identity = self.read_device_identity(device_id)?;
        if let Some(identity) = &identity {
            if self.identities.by_id.len() >= MAX_CACHED_IDENTITIES {
                // Emptied, but still counted as filled: reading every row again would only
                // overflow again.
                self.identities.by_id.clear();
            }
            self.identities.by_id.insert(device_id, identity.clone());
        }
        Ok(identity)
    }

    /// Empties the identity cache if another connection committed since it was filled
    /// (SQLite's `PRAGMA data_version`); one cheap statement, so call it once per batch of
    /// credential checks rather than once per check.
    pub fn refresh_identities(&mut self) -> Result<()> {
        if self.db.dialect() != Dialect::Sqlite {
            return Ok(());
        }
        let version = self
            .db
            .query_row("PRAGMA data_version", &params![], |r| r.get::<i64>(0))?;
        if self.identities.version != Some(version) {
            self.identities.clear();
            self.identities.version = Some(version);
        }
        Ok(())
    }

    /// Runs `read` on one snapshot of the database, so reads made in several statements agree
    /// with each other. On PostgreSQL that is a read-only `REPEATABLE READ` transaction (each
    /// statement otherwise sees what committed before it began, and another aggregator may
    /// commit between two of them); on SQLite the reads run as they are (one aggregator
    /// process writes the rounds there). Not for use inside a transaction.
    pub fn read_snapshot<T>(&self, read: impl FnOnce(&Store) -> Result<T>) -> Result<T> {
        if self.db.dialect() != Dialect::Postgres {
            return read(self);
        }
        self.db
            .execute_batch("BEGIN ISOLATION LEVEL REPEATABLE READ, READ ONLY")?;
        let out = read(self);
        let end = self
            .db
            .execute_batch(if out.is_ok() { "COMMIT" } else { "ROLLBACK" });
        let out = out?;
        end?;
        Ok(out)
    }

    /// Forgets cached identities: this connection changed `devices`.
    fn forget_identities(&mut self) {
        self.identities.clear();
    }

    /// Every device's identity, the first [`MAX_CACHED_IDENTITIES`] by id.
    fn read_all_device_identities(&self) -> Result<std::collections::HashMap<u64, DeviceIdentity>> {
        let rows = self.db.query_map(
            "SELECT device_id, study_id, label, credential_hash, revoked_ms FROM devices
             ORDER BY device_id LIMIT ?1",
            &params![MAX_CACHED_IDENTITIES as i64],
            |r| {
                Ok((
                    r.get::<i64>(0)? as u64,
                    DeviceIdentity {
                        study_id: r.get(1)?,
                        label: r.get(2)?,
                        credential_hash: r.get(3)?,
                        revoked_ms: r.get(4)?,
                    },
                ))
            },
        )?;
        Ok(rows.into_iter().collect())
    }

    fn read_device_identity(&self, device_id: u64) -> Result<Option<DeviceIdentity>> {
        let Ok(id) = i64::try_from(device_id) else {
            return Ok(None);
        };
        self.db.query_opt(
            "SELECT study_id, label, credential_hash, revoked_ms FROM devices WHERE device_id = ?1",
            &params![id],
            |r| {
                Ok(DeviceIdentity {
                    study_id: r.get(0)?,
                    label: r.get(1)?,
                    credential_hash: r.get(2)?,
                    revoked_ms: r.get(3)?,
                })
            },
        )
    }

    /// Inserts a device with the hash of its secret and returns its new id.
    pub fn insert_device(&mut self, d: &NewDevice<'_>, now_ms: i64) -> Result<u64> {
        let &NewDevice {
            study_id,
            label,
            signals,
            consent_share_flags,
            credential_hash,
            sensor_model,
            group,
        } = d;
        let id = self.db.query_row(
            "INSERT INTO devices (study_id, label, signals_json, enrolled_ms,
                                  consent_share_flags, credential_hash, sensor_model, group_label)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)
             RETURNING device_id",
            &params![
                study_id,
                label,
                to_json(&signals),
                now_ms,
                consent_share_flags,
                credential_hash,
                sensor_model,
                group
            ],
            |r| r.get::<u64>(0),
        )?;
        Ok(id)
    }

    /// Gives a device enrolled before credentials existed its credential.
    /// Does nothing to a device that already has one.
    pub fn claim_device_credential(&mut self, device_id: u64, credential_hash: &str) -> Result<()> {
        self.forget_identities();
        self.db.execute(
            "UPDATE devices SET credential_hash = ?2
             WHERE device_id = ?1 AND credential_hash IS NULL",
            &params![device_id as i64, credential_hash],
        )?;
        Ok(())
    }

    /// The id of the device of `study_id` whose participant label or id is
    /// `device` (labels first: a label may look like a number).
    pub fn resolve_device(&self, study_id: &str, device: &str) -> Result<u64> {
        let by_label = self.db.query_opt(
            "SELECT device_id FROM devices WHERE study_id = ?1 AND label = ?2",
            &params![study_id, device],
            |r| r.get::<i64>(0),
        )?;
        let by_id = || -> Result<Option<i64>> {
            let Ok(id) = device.parse::<i64>() else {
                return Ok(None);
            };
            self.db.query_opt(
                "SELECT device_id FROM devices WHERE study_id = ?1 AND device_id = ?2",
                &params![study_id, id],
                |r| r.get::<i64>(0),
            )
        };
        match by_label {
            Some(id) => Ok(id as u64),
            None => by_id()?.map(|id| id as u64).ok_or_else(|| {
                AggregatorError::NotFound(format!(
                    "device: no device with participant label or id `{device}` in study `{study_id}`"
                ))
            }),
        }
    }

    /// Ids of the revoked devices of a study.
    pub fn revoked_devices(&self, study_id: &str) -> Result<Vec<u64>> {
        self.db.query_map(
            "SELECT device_id FROM devices WHERE study_id = ?1 AND revoked_ms IS NOT NULL",
            &params![study_id],
            |r| r.get::<u64>(0),
        )
    }

    /// Marks a device revoked at `now_ms`; the first revocation time is kept.
    pub fn revoke_device(&mut self, device_id: u64, now_ms: i64) -> Result<()> {
        self.forget_identities();
        self.db.execute(
            "UPDATE devices SET revoked_ms = COALESCE(revoked_ms, ?2) WHERE device_id = ?1",
            &params![device_id as i64, now_ms],
        )?;
        Ok(())
    }

    /// Records a changed consent of an enrolled device.
    pub fn set_consent(&mut self, device_id: u64, consent_share_flags: bool) -> Result<()> {
        self.db.execute(
            "UPDATE devices SET consent_share_flags = ?2 WHERE device_id = ?1",
            &params![device_id as i64, consent_share_flags],
        )?;
        Ok(())
    }
    /// Stores `summary` as `device_id`'s latest data summary, replacing any
    /// earlier one.
    pub fn upsert_data_summary(
        &mut self,
        study_id: &str,
        device_id: u64,
        summary: &crate::coverage::DataSummary,
        now_ms: i64,
    ) -> Result<()> {
        self.db.execute(
            "INSERT INTO data_summaries (device_id, study_id, payload_json, received_ms)
             VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (device_id) DO UPDATE
             SET payload_json = excluded.payload_json, received_ms = excluded.received_ms",
            &params![device_id as i64, study_id, to_json(summary), now_ms],
        )?;
        Ok(())
    }

    /// The study's latest data summaries: device id, summary, when received.
    pub fn data_summaries(
        &self,
        study_id: &str,
    ) -> Result<Vec<(u64, crate::coverage::DataSummary, i64)>> {
        let rows = self.db.query_map(
            "SELECT device_id, payload_json, received_ms FROM data_summaries
             WHERE study_id = ?1 ORDER BY device_id",
            &params![study_id],
            |r| Ok((r.get::<i64>(0)?, r.get::<String>(1)?, r.get::<i64>(2)?)),
        )?;
        let mut out = Vec::new();
        for (device_id, payload, received_ms) in rows {
            let summary = serde_json::from_str(&payload).map_err(|e| {
                AggregatorError::Corrupt(format!("data summary of device {device_id}: {e}"))
            })?;
            out.push((device_id as u64, summary, received_ms));
        }
        Ok(out)
    }

    /// Stores a validated flag packet (one episode) and returns its id and
    /// version count. The episode is identified by (device, episode key):
    ///
    /// - new key: a new row (revision 1);
    /// - known key, identical payload: nothing changes (a retry);
    /// - known key, another payload: the new version replaces the stored
    ///   one in place (same id, so the review actions stay attached), unless
    ///   it ends before the stored version (`last_day`), which would be an
    ///   older version arriving late: FAILED_PRECONDITION naming
    ///   `packet.last_day`.
    ///
    /// Two episodes of one device cannot share a peak day (alarm days belong
    /// to one episode): ALREADY_EXISTS naming `packet.episode_key`.
    pub fn upsert_flag_packet(
        &mut self,
        study_id: &str,
        device_id: u64,
        packet: &FlagPacket,
        now_ms: i64,
    ) -> Result<StoredEpisode> {
        let key = &packet.episode.key;
        let signal = packet.signal.clone().unwrap_or_default();
        let date = packet.date.to_string();
        let payload = to_json(packet);
        let tx = self.db.transaction()?;
        let existing: Option<(i64, String, i64)> = tx.query_opt(
            "SELECT packet_id, payload_json, revisions FROM flag_packets
             WHERE device_id = ?1 AND episode_key = ?2",
            &params![device_id as i64, key],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )?;
        let clash: Option<String> = tx.query_opt(
            "SELECT episode_key FROM flag_packets
             WHERE device_id = ?1 AND signal = ?2 AND kind = ?3 AND flag_date = ?4
               AND episode_key <> ?5",
            &params![device_id as i64, signal, packet.kind.as_str(), date, key],
            |r| r.get(0),
        )?;
        if let Some(other) = clash {
            return Err(AggregatorError::AlreadyExists(format!(
                "packet.episode_key: device {device_id} already sent episode `{other}` peaking on \
                 {date}; an alarm day belongs to one episode"
            )));
        }
        let stored = match existing {
            Some((id, stored, revisions)) if stored == payload => StoredEpisode {
                packet_id: id as u64,
                revisions: revisions as u32,
            },
            Some((id, stored, revisions)) => {
                let old: FlagPacket = serde_json::from_str(&stored)
                    .map_err(|e| corrupt(&format!("flag packet {id}"), e))?;
                if packet.last_day < old.last_day {
                    return Err(AggregatorError::FailedPrecondition(format!(
                        "packet.last_day: episode `{key}` already ends on {} here; a version \
                         ending on {} is older and does not replace it",
                        old.last_day, packet.last_day
                    )));
                }
                tx.execute(
                    "UPDATE flag_packets
                     SET signal = ?2, kind = ?3, level = ?4, flag_date = ?5, payload_json = ?6,
                         updated_ms = ?7, revisions = revisions + 1
                     WHERE packet_id = ?1",
                    &params![
                        id,
                        signal,
                        packet.kind.as_str(),
                        packet.level.as_str(),
                        date,
                        payload,
                        now_ms
                    ],
                )?;
                StoredEpisode {
                    packet_id: id as u64,
                    revisions: revisions as u32 + 1,
                }
            }
            None => {
                let packet_id = tx.query_row(
                    "INSERT INTO flag_packets
                       (study_id, device_id, signal, kind, level, flag_date, payload_json,
                        received_ms, episode_key, updated_ms, revisions)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?8, 1)
                     RETURNING packet_id",
                    &params![
                        study_id,
                        device_id as i64,
                        signal,
                        packet.kind.as_str(),
                        packet.level.as_str(),
                        date,
                        payload,
                        now_ms,
                        key
                    ],
                    |r| r.get::<u64>(0),
                )?;
                StoredEpisode {
                    packet_id,
                    revisions: 1,
                }
            }
        };
        tx.commit()?;
        Ok(stored)
    }

    /// All published priors of a study, oldest first.
    pub fn priors(&self, study_id: &str) -> Result<Vec<PriorVersion>> {
        let rows = self.db.query_map(
            "SELECT version, round_id, params_json, contributions_json, created_ms, sensor_terms_json
             FROM priors WHERE study_id = ?1 ORDER BY version",
            &params![study_id],
            |r| {
                Ok((
                    r.get::<i64>(0)?,
                    r.get::<i64>(1)?,
                    r.get::<String>(2)?,
                    r.get::<String>(3)?,
                    r.get::<i64>(4)?,
                    r.get::<String>(5)?,
                ))
            },
        )?;
        let mut out = Vec::new();
        for (version, round_id, params_json, contrib_json, created, sensor_json) in rows {
            out.push(PriorVersion {
                version: version as u32,
                round_id: round_id as u64,
                params: serde_json::from_str(&params_json)
                    .map_err(|e| corrupt(&format!("prior {version} params"), e))?,
                contributions: serde_json::from_str(&contrib_json)
                    .map_err(|e| corrupt(&format!("prior {version} contributions"), e))?,
                created_unix_ms: created,
                sensor_terms: serde_json::from_str(&sensor_json)
                    .map_err(|e| corrupt(&format!("prior {version} sensor terms"), e))?,
            });
        }
        Ok(out)
    }

    /// Largest round id used so far (0 when none).
    pub fn last_round_id(&self, study_id: &str) -> Result<u64> {
        let id: i64 = self.db.query_row(
            "SELECT COALESCE(MAX(round_id), 0) FROM rounds WHERE study_id = ?1",
            &params![study_id],
            |r| r.get(0),
        )?;
        Ok(id as u64)
    }

    /// Number of rounds closed with an aggregation.
    pub fn rounds_completed(&self, study_id: &str) -> Result<u32> {
        let n: i64 = self.db.query_row(
            "SELECT COUNT(*) FROM rounds WHERE study_id = ?1 AND state = 'closed'",
            &params![study_id],
            |r| r.get(0),
        )?;
        Ok(n as u32)
    }

    /// The open round, with its members and accepted submissions.
    pub fn open_round(&self, study_id: &str) -> Result<Option<StoredOpenRound>> {
        let row: Option<(i64, i64)> = self.db.query_opt(
            "SELECT round_id, deadline_ms FROM rounds WHERE study_id = ?1 AND state = 'open'",
            &params![study_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )?;
        let Some((round_id, deadline_ms)) = row else {
            return Ok(None);
        };
        let members = self.db.query_map(
            "SELECT device_id FROM round_members WHERE study_id = ?1 AND round_id = ?2 ORDER BY device_id",
            &params![study_id, round_id],
            |r| r.get::<u64>(0),
        )?;
        let rows = self.db.query_map(
            "SELECT device_id, payload_json FROM updates WHERE study_id = ?1 AND round_id = ?2 ORDER BY device_id",
            &params![study_id, round_id],
            |r| Ok((r.get::<i64>(0)?, r.get::<String>(1)?)),
        )?;
        let mut submissions = Vec::new();
        for (device, json) in rows {
            let updates = serde_json::from_str(&json)
                .map_err(|e| corrupt(&format!("round {round_id} update of device {device}"), e))?;
            submissions.push((device as u64, updates));
        }
        Ok(Some(StoredOpenRound {
            round_id: round_id as u64,
            deadline_ms,
            members,
            submissions,
        }))
    }

    /// A device's stored submission for a round, if any.
    pub fn submission(
        &self,
        study_id: &str,
        round_id: u64,
        device_id: u64,
    ) -> Result<Option<Vec<SignalUpdate>>> {
        let json: Option<String> = self.db.query_opt(
            "SELECT payload_json FROM updates WHERE study_id = ?1 AND round_id = ?2 AND device_id = ?3",
            &params![study_id, round_id as i64, device_id as i64],
            |r| r.get(0),
        )?;
        json.map(|j| serde_json::from_str(&j).map_err(|e| corrupt("stored update", e)))
            .transpose()
    }

    /// Opens a round with its members; when `abandon` names the previous open
    /// round (closed without quorum), marks it abandoned in the same transaction.
    ///
    /// Refused ([`AggregatorError::Superseded`]) when another process changed the rounds
    /// first: the round id is taken, the latest prior is not `base_version`, `abandon` is no
    /// longer open, or another round is open. That last check needs the openings of one study
    /// to take turns: SQLite's write lock does it; on PostgreSQL the study's row is locked
    /// (`FOR UPDATE`) first, so the check sees what a concurrent opening committed.
    pub fn open_new_round(
        &mut self,
        study_id: &str,
        round: &StoredOpenRound,
        base_version: u32,
        abandon: Option<u64>,
        now_ms: i64,
    ) -> Result<()> {
        let tx = self.db.transaction()?;
        let superseded = || {
            AggregatorError::Superseded(format!(
                "round {} of study {study_id}: another aggregator process changed the rounds first",
                round.round_id
            ))
        };
        if tx.dialect() == Dialect::Postgres {
            tx.query_opt(
                "SELECT study_id FROM studies WHERE study_id = ?1 FOR UPDATE",
                &params![study_id],
                |r| r.get::<String>(0),
            )?;
        }
        if let Some(old) = abandon {
            let changed = tx.execute(
                "UPDATE rounds SET state = 'abandoned', closed_ms = ?3
                 WHERE study_id = ?1 AND round_id = ?2 AND state = 'open'",
                &params![study_id, old as i64, now_ms],
            )?;
            if changed != 1 {
                return Err(superseded());
            }
        }
        // The round builds on the latest prior: if another process published one since this
        // one last read, it opens nothing (the rounds and priors of one study form a chain).
        let latest = tx.query_row(
            "SELECT COALESCE(MAX(version), 0) FROM priors WHERE study_id = ?1",
            &params![study_id],
            |r| r.get::<i64>(0),
        )?;
        if latest != i64::from(base_version) {
            return Err(superseded());
        }
        let still_open = tx.query_opt(
            "SELECT round_id FROM rounds WHERE study_id = ?1 AND state = 'open'",
            &params![study_id],
            |r| r.get::<i64>(0),
        )?;
        if still_open.is_some() {
            return Err(superseded());
        }
        let inserted = tx.execute(
            "INSERT INTO rounds (study_id, round_id, state, opened_ms, deadline_ms, base_version)
             VALUES (?1, ?2, 'open', ?3, ?4, ?5)",
            &params![
                study_id,
                round.round_id as i64,
                now_ms,
                round.deadline_ms,
                base_version
            ],
        );
        match inserted {
            Err(e) if e.is_unique_violation() => return Err(superseded()),
            other => other?,
        };
        for m in &round.members {
            tx.execute(
                "INSERT INTO round_members (study_id, round_id, device_id) VALUES (?1, ?2, ?3)",
                &params![study_id, round.round_id as i64, *m as i64],
            )?;
        }
        tx.commit()?;
        Ok(())
    }

    /// Records accepted submissions, `(study, round, device, updates)` each, in one transaction.
    ///
    /// Each round must still be open in the database: on PostgreSQL its row is read `FOR
    /// SHARE`, so a process closing it ([`Store::close_round`], which updates that row) waits
    /// for this commit and then counts these submissions, or this call waits for the close and
    /// is refused (FAILED_PRECONDITION naming `round_id`). Nothing is recorded then.
    pub fn insert_updates(
        &mut self,
        rows: &[(&str, u64, u64, &[SignalUpdate])],
        now_ms: i64,
    ) -> Result<()> {
        let lock = match self.db.dialect() {
            Dialect::Sqlite => "",
            Dialect::Postgres => " FOR SHARE",
        };
        let check = format!("SELECT state FROM rounds WHERE study_id = ?1 AND round_id = ?2{lock}");
        let tx = self.db.transaction()?;
        let mut checked: Vec<(&str, u64)> = Vec::new();
        for &(study_id, round_id, _, _) in rows {
            if checked.contains(&(study_id, round_id)) {
                continue;
            }
            let state = tx.query_opt(&check, &params![study_id, round_id as i64], |r| {
                r.get::<String>(0)
            })?;
            if state.as_deref() != Some("open") {
                return Err(AggregatorError::FailedPrecondition(format!(
                    "round_id: round {round_id} of study `{study_id}` is no longer open"
                )));
            }
            checked.push((study_id, round_id));
        }
        for (study_id, round_id, device_id, updates) in rows {
            tx.execute(
                "INSERT INTO updates (study_id, round_id, device_id, payload_json, received_ms)
                 VALUES (?1, ?2, ?3, ?4, ?5)",
                &params![
                    study_id,
                    *round_id as i64,
                    *device_id as i64,
                    to_json(updates),
                    now_ms
                ],
            )?;
        }
        tx.commit()?;
        Ok(())
    }

    /// Closes a round and publishes the prior it produced, atomically, when the round is
    /// still open and holds exactly `aggregated` stored submissions (the ones the prior was
    /// computed from).
    ///
    /// Exactly one process closes a round: the conditional update (`state = 'open'`) takes
    /// the round's row lock, so of two processes closing at once one changes the row and the
    /// other, after the first commits, changes nothing and is told [`Closing::NotOpen`].
    /// Under that lock no submission to the round can commit any more ([`Store::insert_updates`]
    /// reads the row `FOR SHARE`), so the count is final: a submission another process stored
    /// after this one read them is [`Closing::Stale`], and nothing is written.
    pub fn close_round(
        &mut self,
        study_id: &str,
        round_id: u64,
        prior: &PriorVersion,
        aggregated: usize,
        now_ms: i64,
    ) -> Result<Closing> {
        let tx = self.db.transaction()?;
        let changed = tx.execute(
            "UPDATE rounds SET state = 'closed', closed_ms = ?3
             WHERE study_id = ?1 AND round_id = ?2 AND state = 'open'",
            &params![study_id, round_id as i64, now_ms],
        )?;
        if changed != 1 {
            return Ok(Closing::NotOpen);
        }
        let stored = tx.query_row(
            "SELECT COUNT(*) FROM updates WHERE study_id = ?1 AND round_id = ?2",
            &params![study_id, round_id as i64],
            |r| r.get::<i64>(0),
        )?;
        if stored != aggregated as i64 {
            return Ok(Closing::Stale);
        }
        insert_prior(&tx, study_id, prior)?;
        if fault_injected("close-round-before-commit") {
            // Test hook for the crash-safety test: die inside the closing
            // transaction, as a power cut or SIGKILL would.
            std::process::abort();
        }
        tx.commit()?;
        Ok(Closing::Closed)
    }

    /// How many submissions to `round_id` are stored (from every process).
    pub fn count_updates(&self, study_id: &str, round_id: u64) -> Result<u32> {
        self.db.query_row(
            "SELECT COUNT(*) FROM updates WHERE study_id = ?1 AND round_id = ?2",
            &params![study_id, round_id as i64],
            |r| r.get::<u32>(0),
        )
    }

    /// What changes when another process serving the same study moves it on: rounds
    /// opened and ended, devices enrolled, revoked or changing consent, stages completed.
    /// Equal stamps mean this process's picture of the study is still current. The device
    /// part ([`StudyStamp::devices`]) can be computed from the devices held in memory, so a
    /// process can tell whether reading the newly enrolled ones brought it up to date.
    pub fn study_stamp(&self, study_id: &str) -> Result<StudyStamp> {
        // One pass over the study's devices for the three device terms.
        self.db.query_row(
            "SELECT (SELECT COALESCE(MAX(round_id), 0) FROM rounds WHERE study_id = ?1),
                    (SELECT COUNT(*) FROM rounds WHERE study_id = ?1 AND state <> 'open'),
                    d.n, d.revoked, d.consenting,
                    (SELECT COUNT(*) FROM detection_stages WHERE study_id = ?1)
             FROM (SELECT COUNT(*) AS n,
                          CAST(COALESCE(SUM(CASE WHEN revoked_ms IS NOT NULL THEN 1 ELSE 0 END),
                                        0) AS BIGINT) AS revoked,
                          CAST(COALESCE(SUM(CASE WHEN consent_share_flags = 1 THEN device_id
                                                 ELSE 0 END), 0) AS BIGINT) AS consenting
                   FROM devices WHERE study_id = ?1) AS d",
            &params![study_id],
            |r| {
                Ok(StudyStamp([
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                ]))
            },
        )
    }

    /// Every study's id, sorted.
    pub fn study_ids(&self) -> Result<Vec<String>> {
        self.db.query_map(
            "SELECT study_id FROM studies ORDER BY study_id",
            &params![],
            |r| r.get::<String>(0),
        )
    }

    /// One study's stored settings.
    pub fn study_config(&self, study_id: &str) -> Result<Option<StudyConfig>> {
        self.db
            .query_opt(
                "SELECT config_json FROM studies WHERE study_id = ?1",
                &params![study_id],
                |r| r.get::<String>(0),
            )?
            .map(|json| {
                serde_json::from_str(&json).map_err(|e| corrupt(&format!("study {study_id}"), e))
            })
            .transpose()
    }

    /// Every device's stored submission to a stage, by device id.
    pub fn detection_submissions(
        &self,
        study_id: &str,
        stage: DetectionStage,
    ) -> Result<Vec<(u64, DetectionStats)>> {
        let rows = self.db.query_map(
            "SELECT device_id, payload_json FROM detection_stats
             WHERE study_id = ?1 AND stage = ?2 ORDER BY device_id",
            &params![study_id, stage.as_str()],
            |r| Ok((r.get::<i64>(0)?, r.get::<String>(1)?)),
        )?;
        let mut out = Vec::new();
        for (device, json) in rows {
            let stats = serde_json::from_str(&json)
                .map_err(|e| corrupt(&format!("{} of device {device}", stage.as_str()), e))?;
            out.push((device as u64, stats));
        }
        Ok(out)
    }

    /// Ids of the devices with a stored submission to a stage.
    pub fn detection_submitters(
        &self,
        study_id: &str,
        stage: DetectionStage,
    ) -> Result<std::collections::BTreeSet<u64>> {
        Ok(self
            .db
            .query_map(
                "SELECT device_id FROM detection_stats WHERE study_id = ?1 AND stage = ?2",
                &params![study_id, stage.as_str()],
                |r| r.get::<u64>(0),
            )?
            .into_iter()
            .collect())
    }

    /// A completed stage's published sum, if the stage is complete.
    pub fn completed_stage(
        &self,
        study_id: &str,
        stage: DetectionStage,
    ) -> Result<Option<CompletedStage>> {
        let row: Option<(i64, i64, String, String)> = self.db.query_opt(
            "SELECT completed_ms, n_devices, sum_json, group_sums_json FROM detection_stages
             WHERE study_id = ?1 AND stage = ?2",
            &params![study_id, stage.as_str()],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)),
        )?;
        row.map(|(completed_ms, n, json, groups_json)| {
            Ok(CompletedStage {
                completed_ms,
                n_devices: n as u32,
                sum: serde_json::from_str(&json)
                    .map_err(|e| corrupt(&format!("published {}", stage.as_str()), e))?,
                group_sums: serde_json::from_str(&groups_json)
                    .map_err(|e| corrupt(&format!("published {} per group", stage.as_str()), e))?,
            })
        })
        .transpose()
    }

    /// Stores (or replaces) a device's submission to a stage and, when
    /// `complete` is given, publishes the stage's sum, in one transaction.
    pub fn put_detection_stats(
        &mut self,
        study_id: &str,
        device_id: u64,
        stats: &DetectionStats,
        complete: Option<&CompletedStage>,
        now_ms: i64,
    ) -> Result<()> {
        let tx = self.db.transaction()?;
        tx.execute(
            "INSERT INTO detection_stats (study_id, stage, device_id, payload_json, received_ms)
             VALUES (?1, ?2, ?3, ?4, ?5)
             ON CONFLICT (study_id, stage, device_id)
             DO UPDATE SET payload_json = excluded.payload_json, received_ms = excluded.received_ms",
            &params![
                study_id,
                stats.stage().as_str(),
                device_id as i64,
                to_json(stats),
                now_ms
            ],
        )?;
        if let Some(c) = complete {
            insert_completed_stage(&tx, study_id, c)?;
        }
        tx.commit()?;
        Ok(())
    }

    /// Publishes a stage's sum (completion at the deadline).
    pub fn complete_stage(&mut self, study_id: &str, completed: &CompletedStage) -> Result<()> {
        let tx = self.db.transaction()?;
        insert_completed_stage(&tx, study_id, completed)?;
        tx.commit()?;
        Ok(())
    }

    /// Checks the stored state; returns the report lines, `["ok"]` when sound.
    ///
    /// SQLite: its own `PRAGMA integrity_check` (pages, indexes, constraints).
    /// PostgreSQL, which keeps its own pages consistent, has no such pragma:
    /// the check is the invariants a crash must not break, which a database
    /// cannot state as constraints: at most one open round per study, and one
    /// published prior per closed round.
    pub fn integrity_check(&self) -> Result<Vec<String>> {
        if let Some(conn) = self.db.sqlite_conn() {
            let mut stmt = conn.prepare("PRAGMA integrity_check")?;
            let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
            return Ok(rows.collect::<rusqlite::Result<Vec<_>>>()?);
        }
        let mut problems = self.db.query_map(
            "SELECT study_id FROM rounds WHERE state = 'open'
             GROUP BY study_id HAVING COUNT(*) > 1",
            &params![],
            |r| {
                Ok(format!(
                    "study {} has more than one open round",
                    r.get::<String>(0)?
                ))
            },
        )?;
        problems.extend(self.db.query_map(
            "SELECT r.study_id, r.round_id FROM rounds r
             WHERE r.state = 'closed' AND (SELECT COUNT(*) FROM priors p
                   WHERE p.study_id = r.study_id AND p.round_id = r.round_id) <> 1",
            &params![],
            |r| {
                Ok(format!(
                    "closed round {} of study {} has not exactly one prior",
                    r.get::<i64>(1)?,
                    r.get::<String>(0)?
                ))
            },
        )?);
        if problems.is_empty() {
            problems.push("ok".into());
        }
        Ok(problems)
    }
}

fn insert_completed_stage(tx: &Db, study_id: &str, c: &CompletedStage) -> Result<()> {
    tx.execute(
        "INSERT INTO detection_stages (study_id, stage, completed_ms, n_devices, sum_json,
                                       group_sums_json)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        &params![
            study_id,
            c.sum.stage().as_str(),
            c.completed_ms,
            c.n_devices,
            to_json(&c.sum),
            to_json(&c.group_sums)
        ],
    )?;
    Ok(())
}

fn insert_prior(tx: &Db, study_id: &str, prior: &PriorVersion) -> Result<()> {
    tx.execute(
        "INSERT INTO priors (study_id, version, round_id, params_json, contributions_json, created_ms,
                             sensor_terms_json)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        &params![
            study_id,
            prior.version,
            prior.round_id as i64,
            to_json(&prior.params),
            to_json(&prior.contributions),
            prior.created_unix_ms,
            to_json(&prior.sensor_terms)
        ],
    )?;
    Ok(())
}

/// Whether the fault named `point` is requested through the
/// `PLIMSOLL_FAULT_INJECT` environment variable. Used only by the
/// crash-safety test, which runs the real binary; unset in normal use.
fn fault_injected(point: &str) -> bool {
    std::env::var("PLIMSOLL_FAULT_INJECT").is_ok_and(|v| v == point)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A database as version 1 left it: schema 1, one study, one device.
    fn version_1_database(path: &Path) {
        let conn = Connection::open(path).unwrap();
        conn.execute_batch(SCHEMA_V1).unwrap();
        conn.execute("INSERT INTO schema_version (version) VALUES (1)", [])
            .unwrap();
        conn.execute(
            "INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0)",
            [],
        )
        .unwrap();
        conn.execute(
            "INSERT INTO devices (study_id, label, signals_json, enrolled_ms)
             VALUES ('s', 'p-1', '[\"steps\"]', 0)",
            [],
        )
        .unwrap();
    }

    #[test]
    fn opens_a_version_1_database_by_migrating_it() {
        let dir = std::env::temp_dir().join(format!("plimsoll-migrate-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("v1.db");
        let _ = std::fs::remove_file(&path);
        version_1_database(&path);
        let mut store = Store::open(&path).unwrap();
        assert_eq!(store.schema_version().unwrap(), SCHEMA_VERSION);
        let devices = store.devices("s").unwrap();
        assert_eq!(devices.len(), 1);
        assert_eq!(devices[0].label, "p-1");
        assert!(
            !devices[0].consent_share_flags,
            "old devices did not consent"
        );
        assert!(!devices[0].revoked);
        let identity = store
            .device_identity(devices[0].device_id)
            .unwrap()
            .unwrap();
        assert_eq!(
            identity.credential_hash, None,
            "old devices have no credential"
        );
        assert_eq!(store.enrollment_code_hash("s").unwrap(), None);
        // Version 4's tables exist after migrating, empty (common practice:
        // a migration test checks the new schema objects are there).
        for table in ["detection_stats", "detection_stages"] {
            let n: i64 = store
                .db()
                .sqlite_conn()
                .unwrap()
                .query_row(&format!("SELECT COUNT(*) FROM {table}"), [], |r| r.get(0))
                .unwrap_or_else(|e| panic!("table {table} after migrating: {e}"));
            assert_eq!(n, 0, "{table}");
        }
        assert!(
            store
                .detection_submissions("s", DetectionStage::ResidualMoments)
                .unwrap()
                .is_empty()
        );
        assert_eq!(
            store
                .completed_stage("s", DetectionStage::EpisodeHistogram)
                .unwrap(),
            None
        );
        drop(store);
        // Opening again is a no-op.
        assert_eq!(
            Store::open(&path).unwrap().schema_version().unwrap(),
            SCHEMA_VERSION
        );
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// A flag packet as schema 3 stored it (before episodes), as JSON.
    fn legacy_payload(signal: Option<&str>, kind: &str, day: &str, score: f64) -> String {
        let window_day = serde_json::json!({
            "date": day, "observed": 70.0, "mean": 62.0, "sd": 2.5,
            "lo50": 60.3, "hi50": 63.7, "lo95": 57.1, "hi95": 66.9,
            "z": 3.2, "tail_p": 0.0014, "conditioned": false, "status": "flagged"
        });
        let column = signal.unwrap_or("resting_hr_bpm");
        serde_json::json!({
            "signal": signal, "kind": kind, "level": "alert",
            "first_day": "2024-04-01", "last_day": day, "date": day, "score": score,
            "reason": format!("old {kind} flag"),
            "window_start": "2024-03-04", "window_end": "2024-04-05",
            "signals": [{
                "signal": column,
                "population": {"mean": 62.0, "lo50": 58.0, "hi50": 66.0, "lo95": 50.0, "hi95": 74.0},
                "days": [window_day]
            }]
        })
        .to_string()
    }

    /// Source: the brief's migration rule (each stored packet becomes one episode of one
    /// alarm day; its review actions stay attached) and common practice (a migration keeps
    /// every row and every audit record).
    #[test]
    fn a_version_3_database_migrates_every_packet_and_action_into_episodes() {
        use crate::packets::{PatternDirection, SignalDirection};
        use crate::review::db;
        let dir = std::env::temp_dir().join(format!("plimsoll-migrate-v3-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("v3.db");
        let _ = std::fs::remove_file(&path);
        {
            let conn = Connection::open(&path).unwrap();
            conn.execute_batch(SCHEMA_V1).unwrap();
            conn.execute("INSERT INTO schema_version (version) VALUES (1)", [])
                .unwrap();
            conn.execute_batch(MIGRATE_V1_TO_V2).unwrap();
            conn.execute_batch(MIGRATE_V2_TO_V3).unwrap();
            conn.execute_batch(
                "INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0);
                 INSERT INTO devices (study_id, label, signals_json, enrolled_ms, consent_share_flags)
                   VALUES ('s', 'p-1', '[]', 0, 1);
                 INSERT INTO reviewers VALUES ('r', 'x', 0);",
            )
            .unwrap();
            let packets = [
                (Some("hrv_rmssd_ms"), "single_day", "2024-04-02", -3.4),
                (Some("resting_hr_bpm"), "cusum", "2024-04-03", 6.1),
                (None, "multi_signal", "2024-04-04", 4.2),
            ];
            for (signal, kind, day, score) in packets {
                conn.execute(
                    "INSERT INTO flag_packets
                       (study_id, device_id, signal, kind, level, flag_date, payload_json, received_ms)
                     VALUES ('s', 1, ?1, ?2, 'alert', ?3, ?4, 1000)",
                    params![
                        signal.unwrap_or(""),
                        kind,
                        day,
                        legacy_payload(signal, kind, day, score)
                    ],
                )
                .unwrap();
            }
            conn.execute_batch(
                "INSERT INTO review_actions (packet_id, reviewer, action, note, at_ms)
                   VALUES (1, 'r', 'acknowledge', 'seen', 2000),
                          (1, 'r', 'escalate', 'to the nurse', 3000),
                          (3, 'r', 'dismiss', 'known cause', 4000);",
            )
            .unwrap();
            let version: i64 = conn
                .query_row("SELECT version FROM schema_version", [], |r| r.get(0))
                .unwrap();
            assert_eq!(version, 3);
        }
        let mut store = Store::open(&path).unwrap();
        assert_eq!(store.schema_version().unwrap(), SCHEMA_VERSION);
        assert_eq!(store.integrity_check().unwrap(), ["ok"]);

        let queue = db::queue(&store, "s", &db::QueueFilter::default()).unwrap();
        assert_eq!(queue.len(), 3, "every packet survives as an episode");
        let status = |id: u64| queue.iter().find(|e| e.packet_id == id).unwrap().status;
        assert_eq!(status(1), db::ReviewStatus::Escalated);
        assert_eq!(status(2), db::ReviewStatus::New);
        assert_eq!(status(3), db::ReviewStatus::Dismissed);

        let hrv = db::flag(&store, 1).unwrap().unwrap();
        assert_eq!(hrv.history.len(), 2, "every action survives");
        assert_eq!(hrv.history[1].note, "to the nurse");
        assert_eq!(hrv.revisions, 1);
        assert_eq!(hrv.updated_ms, 1000);
        let e = &hrv.packet.episode;
        assert_eq!(e.key, "legacy-1");
        assert_eq!(e.alarm_days, 1);
        assert!(!e.ongoing);
        assert_eq!(
            e.direction, None,
            "the old single-signal flags had no pattern"
        );
        assert_eq!(e.involved.len(), 1);
        assert_eq!(e.involved[0].signal, "hrv_rmssd_ms");
        assert_eq!(e.involved[0].direction, SignalDirection::Down);
        assert_eq!(e.involved[0].departure, -3.4);
        assert_eq!(e.peak_window_start.to_string(), "2024-04-01");
        assert_eq!(
            hrv.packet.reason, "old single_day flag",
            "the reason is kept"
        );

        let cusum = db::flag(&store, 2).unwrap().unwrap();
        assert_eq!(
            cusum.packet.episode.involved[0].direction,
            SignalDirection::Up
        );
        let multi = db::flag(&store, 3).unwrap().unwrap();
        assert_eq!(
            multi.packet.episode.direction,
            Some(PatternDirection::Target)
        );
        assert!(multi.packet.episode.involved.is_empty());
        assert_eq!(multi.history.len(), 1);

        // A device's new episode goes next to the migrated ones; a key starting
        // with `legacy-` cannot be sent (see `FlagPacket::validate`).
        let mut fresh = hrv.packet.clone();
        fresh.episode.key = "ep-2024-04-09".into();
        fresh.date = "2024-04-05".parse().unwrap();
        fresh.last_day = fresh.date;
        let stored = store.upsert_flag_packet("s", 1, &fresh, 5000).unwrap();
        assert_eq!(
            stored,
            StoredEpisode {
                packet_id: 4,
                revisions: 1
            }
        );
        drop(store);
        assert_eq!(
            Store::open(&path).unwrap().schema_version().unwrap(),
            SCHEMA_VERSION
        );
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn a_version_6_database_gains_data_summaries_and_a_summary_replaces_the_last() {
        use crate::coverage::{DataSummary, SignalCoverage};
        let dir = std::env::temp_dir().join(format!("plimsoll-v6-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("v6.db");
        let _ = std::fs::remove_file(&path);
        {
            // A version-6 database: today's schema without the version-7 table and the
            // version-8 columns.
            let store = Store::open(&path).unwrap();
            store
                .db()
                .sqlite_conn()
                .unwrap()
                .execute_batch(DROP_V8)
                .unwrap();
            store
                .db()
                .sqlite_conn()
                .unwrap()
                .execute_batch(
                    "DROP TABLE data_summaries; UPDATE schema_version SET version = 6;
                     INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0);
                     INSERT INTO devices (study_id, label, signals_json, enrolled_ms)
                       VALUES ('s', 'p-1', '[\"steps\"]', 0);",
                )
                .unwrap();
        }
        let mut store = Store::open(&path).unwrap();
        assert_eq!(store.schema_version().unwrap(), SCHEMA_VERSION);
        assert_eq!(store.devices("s").unwrap().len(), 1, "rows kept");
        assert!(store.data_summaries("s").unwrap().is_empty());
        let day = |s: &str| s.parse().unwrap();
        let mut summary = DataSummary {
            first_day: day("2024-01-01"),
            last_day: day("2024-01-10"),
            signals: vec![SignalCoverage {
                signal: "steps".into(),
                days_with_data: 9,
                last_day: Some(day("2024-01-10")),
            }],
        };
        store.upsert_data_summary("s", 1, &summary, 5).unwrap();
        summary.last_day = day("2024-01-20");
        summary.signals[0].days_with_data = 18;
        store.upsert_data_summary("s", 1, &summary, 9).unwrap();
        assert_eq!(store.data_summaries("s").unwrap(), vec![(1, summary, 9)]);
        drop(store);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// Today's schema back to version 7: without the version-8 columns.
    const DROP_V8: &str = "
        ALTER TABLE devices DROP COLUMN sensor_model;
        ALTER TABLE devices DROP COLUMN group_label;
        ALTER TABLE priors DROP COLUMN sensor_terms_json;
        ALTER TABLE detection_stages DROP COLUMN group_sums_json;
        UPDATE schema_version SET version = 7;";

    #[test]
    fn a_version_7_database_gains_sensor_models_and_groups_and_keeps_its_rows() {
        let dir = std::env::temp_dir().join(format!("plimsoll-v7-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("v7.db");
        let _ = std::fs::remove_file(&path);
        {
            let store = Store::open(&path).unwrap();
            store
                .db()
                .sqlite_conn()
                .unwrap()
                .execute_batch(DROP_V8)
                .unwrap();
            store
                .db()
                .sqlite_conn()
                .unwrap()
                .execute_batch(
                    "INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0);
                     INSERT INTO devices (study_id, label, signals_json, enrolled_ms)
                       VALUES ('s', 'p-1', '[\"steps\"]', 0);
                     INSERT INTO priors (study_id, version, round_id, params_json, contributions_json, created_ms)
                       VALUES ('s', 0, 0, '[{\"signal\":\"steps\",\"values\":[1.0]}]', '[]', 0);
                     INSERT INTO detection_stages (study_id, stage, completed_ms, n_devices, sum_json)
                       VALUES ('s', 'episode_histogram', 5, 1,
                               '{\"episode_histogram\":{\"episodes\":[],\"scored_days\":0}}');",
                )
                .unwrap();
            assert_eq!(store.schema_version().unwrap(), 7);
        }
        let store = Store::open(&path).unwrap();
        assert_eq!(store.schema_version().unwrap(), SCHEMA_VERSION);
        let devices = store.devices("s").unwrap();
        assert_eq!(devices.len(), 1, "rows kept");
        assert_eq!(
            (
                devices[0].sensor_model.as_deref(),
                devices[0].group.as_deref()
            ),
            (None, None)
        );
        let priors = store.priors("s").unwrap();
        assert_eq!(priors.len(), 1);
        assert!(priors[0].sensor_terms.is_empty());
        let stage = store
            .completed_stage("s", DetectionStage::EpisodeHistogram)
            .unwrap()
            .expect("the completed stage is kept");
        assert!(stage.group_sums.is_empty());
        drop(store);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// A store on a fresh database of the PostgreSQL test cluster, or `None` (skipped).
    fn postgres_store(test: &str) -> Option<Store> {
        let url = crate::db::test_database(test)?;
        Some(Store::open_postgres(&url).unwrap())
    }

    /// A study row with its prior version 0, written as `create_study` does.
    fn bare_study(store: &mut Store) {
        store
            .db()
            .execute(
                "INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0)",
                &params![],
            )
            .unwrap();
        insert_prior(store.db(), "s", &prior(0, 0)).unwrap();
    }

    fn prior(version: u32, round_id: u64) -> PriorVersion {
        PriorVersion {
            version,
            round_id,
            params: vec![crate::study::SignalParams {
                signal: "steps".into(),
                values: vec![f64::from(version)],
            }],
            contributions: Vec::new(),
            created_unix_ms: 0,
            sensor_terms: Vec::new(),
        }
    }

    fn new_device<'a>(label: &'a str, signals: &'a [String]) -> NewDevice<'a> {
        NewDevice {
            study_id: "s",
            label,
            signals,
            consent_share_flags: false,
            credential_hash: "00",
            sensor_model: None,
            group: None,
        }
    }

    /// The identity cache never outlives a change: a revocation committed by another
    /// connection (as `plimsoll-aggregator device revoke` in another process does) is seen
    /// after the next refresh, and this connection's own revocation at once (source: SQLite's
    /// documentation of `PRAGMA data_version`: it changes when another connection commits).
    #[test]
    fn cached_identities_follow_revocations_from_either_connection() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("cache.db");
        let mut served = Store::open(&path).unwrap();
        bare_study(&mut served);
        let signals = vec!["steps".to_string()];
        let a = served
            .insert_device(&new_device("p-a", &signals), 1)
            .unwrap();
        let b = served
            .insert_device(&new_device("p-b", &signals), 1)
            .unwrap();
        served.refresh_identities().unwrap();
        // The first miss reads every device at once.
        assert_eq!(served.device_identity(a).unwrap().unwrap().label, "p-a");
        assert_eq!(
            served.identities.by_id.len(),
            2,
            "both devices cached by one read"
        );
        assert_eq!(served.device_identity(b).unwrap().unwrap().label, "p-b");
        // A device enrolled after that read is still found (a single-row read).
        let c = served
            .insert_device(&new_device("p-c", &signals), 1)
            .unwrap();
        assert_eq!(served.device_identity(c).unwrap().unwrap().label, "p-c");
        for id in [a, b] {
            let identity = served.device_identity(id).unwrap().unwrap();
            assert_eq!(identity.revoked_ms, None);
        }

        let mut admin = Store::open(&path).unwrap();
        admin.revoke_device(a, 7).unwrap();
        // Until the refresh the cached answer stands (why the credential check refreshes).
        assert_eq!(served.device_identity(a).unwrap().unwrap().revoked_ms, None);
        served.refresh_identities().unwrap();
        assert_eq!(
            served.device_identity(a).unwrap().unwrap().revoked_ms,
            Some(7)
        );

        served.revoke_device(b, 9).unwrap();
        assert_eq!(
            served.device_identity(b).unwrap().unwrap().revoked_ms,
            Some(9)
        );
        // Nothing else committed: the refresh keeps what is cached, and it is still right.
        served.refresh_identities().unwrap();
        assert_eq!(
            served.device_identity(a).unwrap().unwrap().revoked_ms,
            Some(7)
        );
        assert_eq!(served.device_identity(99).unwrap(), None, "unknown devices");
    }

    /// The store's invariants, the same checks on each database (source: the brief's
    /// store contract, "one transaction per state change; closing a round and publishing its
    /// prior atomic; audit trail append-only, enforced in the database"; common practice for
    /// the rest: ids from the database, a conditional update decides a race).
    fn store_contract(mut store: Store) {
        bare_study(&mut store);
        let signals = vec!["steps".to_string()];
        let a = store
            .insert_device(&new_device("p-a", &signals), 1)
            .unwrap();
        let b = store
            .insert_device(&new_device("p-b", &signals), 1)
            .unwrap();
        assert!(b > a, "ids come from the database, in order");
        assert_eq!(store.resolve_device("s", "p-b").unwrap(), b);
        let dup = store
            .insert_device(&new_device("p-a", &signals), 1)
            .unwrap_err();
        assert!(dup.is_unique_violation(), "one label per study: {dup}");

        let round = StoredOpenRound {
            round_id: 1,
            deadline_ms: 100,
            members: vec![a, b],
            submissions: Vec::new(),
        };
        store.open_new_round("s", &round, 0, None, 10).unwrap();
        // The same round again, or a round on a prior that is not the latest: another
        // process got there first.
        let again = store.open_new_round("s", &round, 0, None, 10).unwrap_err();
        assert!(matches!(again, AggregatorError::Superseded(_)), "{again}");
        let update = |v: f64| {
            vec![SignalUpdate {
                signal: "steps".into(),
                values: vec![v],
                n_days: 3,
                local_loss: 0.5,
            }]
        };
        let (ua, ub) = (update(1.0), update(2.0));
        store.insert_updates(&[("s", 1, a, &ua)], 20).unwrap();
        // Closing with a count that misses a stored submission writes nothing.
        assert_eq!(
            store.close_round("s", 1, &prior(1, 1), 0, 30).unwrap(),
            Closing::Stale
        );
        assert_eq!(store.rounds_completed("s").unwrap(), 0);
        assert_eq!(store.priors("s").unwrap().len(), 1);
        store.insert_updates(&[("s", 1, b, &ub)], 20).unwrap();
        assert_eq!(store.count_updates("s", 1).unwrap(), 2);
        assert_eq!(
            store.close_round("s", 1, &prior(1, 1), 2, 30).unwrap(),
            Closing::Closed
        );
        assert_eq!(
            store.close_round("s", 1, &prior(1, 1), 2, 30).unwrap(),
            Closing::NotOpen
        );
        assert_eq!(
            store.priors("s").unwrap().len(),
            2,
            "one prior per closed round"
        );
        let late = store.insert_updates(&[("s", 1, a, &ua)], 40).unwrap_err();
        assert!(
            matches!(late, AggregatorError::FailedPrecondition(_)),
            "{late}"
        );
        let stale_base = StoredOpenRound {
            round_id: 2,
            ..round.clone()
        };
        let on_old_prior = store
            .open_new_round("s", &stale_base, 0, None, 50)
            .unwrap_err();
        assert!(
            matches!(on_old_prior, AggregatorError::Superseded(_)),
            "{on_old_prior}"
        );
        store.open_new_round("s", &stale_base, 1, None, 50).unwrap();
        // Abandoning a round someone else already ended opens nothing.
        let third = StoredOpenRound {
            round_id: 3,
            ..round.clone()
        };
        store.open_new_round("s", &third, 1, Some(2), 60).unwrap();
        let fourth = StoredOpenRound {
            round_id: 4,
            ..round
        };
        let twice = store
            .open_new_round("s", &fourth, 1, Some(2), 70)
            .unwrap_err();
        assert!(matches!(twice, AggregatorError::Superseded(_)), "{twice}");
        // A round while another is open, from a process whose picture missed the open one
        // (the latest prior has not moved, and the new id is free): refused, one open round
        // per study.
        let beside = store.open_new_round("s", &fourth, 1, None, 70).unwrap_err();
        assert!(matches!(beside, AggregatorError::Superseded(_)), "{beside}");
        assert_eq!(store.open_round("s").unwrap().unwrap().round_id, 3);
        assert_eq!(store.last_round_id("s").unwrap(), 3);

        // The audit trail refuses updates and deletes, whatever the database.
        let c = store.db();
        c.execute_batch(
            "INSERT INTO flag_packets (study_id, device_id, signal, kind, level, flag_date, payload_json, received_ms)
               VALUES ('s', 1, 'steps', 'cusum', 'alert', '2024-01-01', '{}', 0);
             INSERT INTO reviewers (name, password_hash, created_ms) VALUES ('r', 'x', 0);
             INSERT INTO review_actions (packet_id, reviewer, action, note, at_ms)
               VALUES (1, 'r', 'acknowledge', '', 0);
             INSERT INTO review_login_events (at_ms, name, source, event, detail)
               VALUES (0, 'r', 'here', 'success', '');",
        )
        .unwrap();
        for table in ["review_actions", "review_login_events"] {
            let update = c.execute(&format!("UPDATE {table} SET at_ms = 5"), &params![]);
            assert!(
                update.unwrap_err().to_string().contains("append-only"),
                "{table}"
            );
            let delete = c.execute(&format!("DELETE FROM {table}"), &params![]);
            assert!(
                delete.unwrap_err().to_string().contains("append-only"),
                "{table}"
            );
        }
        assert_eq!(store.integrity_check().unwrap(), ["ok"]);
    }

    /// Reads on one snapshot agree with each other while another process opens a round
    /// (PostgreSQL's `REPEATABLE READ`: a transaction sees the data as of its first statement,
    /// PostgreSQL 15 documentation, §13.2.2). Without the snapshot the second read sees the
    /// new round's id but the first did not see it open.
    #[test]
    fn a_snapshot_read_does_not_see_a_round_opened_halfway() {
        let Some(url) = crate::db::test_database("snapshot") else {
            return;
        };
        let mut reader = Store::open_postgres(&url).unwrap();
        bare_study(&mut reader);
        let mut other = Store::open_postgres(&url).unwrap();
        let round = StoredOpenRound {
            round_id: 1,
            deadline_ms: 100,
            members: Vec::new(),
            submissions: Vec::new(),
        };
        let (open, last) = reader
            .read_snapshot(|store| {
                let open = store.open_round("s")?.map(|r| r.round_id);
                other.open_new_round("s", &round, 0, None, 10)?;
                Ok((open, store.last_round_id("s")?))
            })
            .unwrap();
        assert_eq!((open, last), (None, 0), "one picture, before the round");
        assert_eq!(reader.open_round("s").unwrap().unwrap().round_id, 1);
        assert_eq!(reader.last_round_id("s").unwrap(), 1);
    }

    #[test]
    fn the_store_contract_holds_on_sqlite() {
        store_contract(Store::in_memory().unwrap());
    }

    #[test]
    fn the_store_contract_holds_on_postgres() {
        if let Some(store) = postgres_store("contract") {
            assert_eq!(store.dialect(), Dialect::Postgres);
            assert_eq!(store.schema_version().unwrap(), SCHEMA_VERSION);
            store_contract(store);
        }
    }

    /// The two schemas hold the same tables with the same columns (the invariant that a
    /// schema change goes to both databases; DEVELOPERS.md, "Architecture invariants").
    #[test]
    fn both_databases_have_the_same_tables_and_columns() {
        let Some(postgres) = postgres_store("schema_parity") else {
            return;
        };
        let sqlite = Store::in_memory().unwrap();
        let columns = |store: &Store, sql: &str| -> std::collections::BTreeSet<(String, String)> {
            store
                .db()
                .query_map(sql, &params![], |r| {
                    Ok((r.get::<String>(0)?, r.get::<String>(1)?))
                })
                .unwrap()
                .into_iter()
                .collect()
        };
        let on_sqlite = columns(
            &sqlite,
            "SELECT m.name, p.name FROM sqlite_master m, pragma_table_info(m.name) p
             WHERE m.type = 'table' AND m.name NOT LIKE 'sqlite_%'",
        );
        let on_postgres = columns(
            &postgres,
            "SELECT CAST(table_name AS TEXT), CAST(column_name AS TEXT)
             FROM information_schema.columns WHERE table_schema = 'public'",
        );
        assert!(on_sqlite.len() > 40, "too few columns read: {on_sqlite:?}");
        assert_eq!(
            on_sqlite.difference(&on_postgres).collect::<Vec<_>>(),
            Vec::<&(String, String)>::new(),
            "on SQLite only"
        );
        assert_eq!(
            on_postgres.difference(&on_sqlite).collect::<Vec<_>>(),
            Vec::<&(String, String)>::new(),
            "on PostgreSQL only"
        );
    }

    #[test]
    fn review_actions_are_append_only() {
        let store = Store::in_memory().unwrap();
        let c = store.db().sqlite_conn().unwrap();
        c.execute_batch(
            "INSERT INTO studies (study_id, config_json, created_ms) VALUES ('s', '{}', 0);
             INSERT INTO devices (study_id, label, signals_json, enrolled_ms) VALUES ('s', 'p', '[]', 0);
             INSERT INTO flag_packets (study_id, device_id, signal, kind, level, flag_date, payload_json, received_ms)
               VALUES ('s', 1, 'steps', 'cusum', 'alert', '2024-01-01', '{}', 0);
             INSERT INTO reviewers VALUES ('r', 'x', 0);
             INSERT INTO review_actions (packet_id, reviewer, action, note, at_ms)
               VALUES (1, 'r', 'acknowledge', '', 0);",
        )
        .unwrap();
        let update = c.execute("UPDATE review_actions SET action = 'dismiss'", []);
        assert!(update.unwrap_err().to_string().contains("append-only"));
        let delete = c.execute("DELETE FROM review_actions", []);
        assert!(delete.unwrap_err().to_string().contains("append-only"));
    }
}
