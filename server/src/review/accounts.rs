//! Reviewer accounts, study assignments and login sessions.
//!
//! - Passwords are stored as Argon2id PHC strings (RFC 9106 parameters as
//!   chosen by the `argon2` crate's defaults: m = 19 MiB, t = 2, p = 1).
//! - A session is a random 256-bit token given to the browser in a cookie;
//!   the database keeps only its SHA-256, so a copy of the database does not
//!   let anyone act as a reviewer.
//! - Each session has its own random CSRF token, embedded in every form and
//!   checked on every state-changing request.

use argon2::Argon2;
use argon2::password_hash::phc::PasswordHash;
use argon2::password_hash::{PasswordHasher, PasswordVerifier};

use crate::error::{AggregatorError, Result};
use crate::params;
pub use crate::secrets::constant_time_eq;
use crate::secrets::{random_readable, random_token, secret_hash};
use crate::store::Store;
use crate::study::valid_id;

/// How long a login lasts, in milliseconds (8 hours: one working shift).
pub const SESSION_TTL_MS: i64 = 8 * 3600 * 1000;

/// Shortest password accepted when creating a reviewer.
pub const MIN_PASSWORD_CHARS: usize = 12;

/// A logged-in reviewer.
#[derive(Debug, Clone, PartialEq)]
pub struct Session {
    pub reviewer: String,
    pub csrf_token: String,
    /// Studies this reviewer is assigned to, sorted.
    pub studies: Vec<String>,
}

impl Session {
    pub fn may_see(&self, study_id: &str) -> bool {
        self.studies.iter().any(|s| s == study_id)
    }
}

fn token_hash(token: &str) -> String {
    secret_hash(token)
}

fn hash_password(password: &str) -> Result<String> {
    Argon2::default()
        .hash_password(password.as_bytes())
        .map(|h| h.to_string())
        .map_err(|e| AggregatorError::invalid("password", format!("cannot hash: {e}")))
}

/// Creates a reviewer account. Fails if the name is taken or malformed, or
/// the password is shorter than [`MIN_PASSWORD_CHARS`].
pub fn add_reviewer(store: &mut Store, name: &str, password: &str, now_ms: i64) -> Result<()> {
    if !valid_id(name) {
        return Err(AggregatorError::invalid(
            "name",
            format!("`{name}` must match [A-Za-z0-9_-]{{1,64}}"),
        ));
    }
    if password.chars().count() < MIN_PASSWORD_CHARS {
        return Err(AggregatorError::invalid(
            "password",
            format!("must have at least {MIN_PASSWORD_CHARS} characters"),
        ));
    }
    let hash = hash_password(password)?;
    let inserted = store.db().execute(
        "INSERT INTO reviewers (name, password_hash, created_ms) VALUES (?1, ?2, ?3)
         ON CONFLICT DO NOTHING",
        &params![name, hash, now_ms],
    )?;
    if inserted == 0 {
        return Err(AggregatorError::AlreadyExists(format!(
            "name: reviewer `{name}` already exists"
        )));
    }
    Ok(())
}

/// Replaces a reviewer's password and ends their sessions.
pub fn set_password(store: &mut Store, name: &str, password: &str) -> Result<()> {
    if password.chars().count() < MIN_PASSWORD_CHARS {
        return Err(AggregatorError::invalid(
            "password",
            format!("must have at least {MIN_PASSWORD_CHARS} characters"),
        ));
    }
    let hash = hash_password(password)?;
    let tx = store.db_mut().transaction()?;
    let changed = tx.execute(
        "UPDATE reviewers SET password_hash = ?2 WHERE name = ?1",
        &params![name, hash],
    )?;
    if changed == 0 {
        return Err(AggregatorError::NotFound(format!(
            "name: no reviewer `{name}`"
        )));
    }
    tx.execute(
        "DELETE FROM review_sessions WHERE reviewer = ?1",
        &params![name],
    )?;
    tx.commit()?;
    Ok(())
}

/// Lets `name` review `study_id`.
pub fn assign(store: &mut Store, name: &str, study_id: &str) -> Result<()> {
    let db = store.db();
    let known: bool = db.query_row(
        "SELECT EXISTS (SELECT 1 FROM reviewers WHERE name = ?1)",
        &params![name],
        |r| r.get(0),
    )?;
    if !known {
        return Err(AggregatorError::NotFound(format!(
            "name: no reviewer `{name}`"
        )));
    }
    let study: bool = db.query_row(
        "SELECT EXISTS (SELECT 1 FROM studies WHERE study_id = ?1)",
        &params![study_id],
        |r| r.get(0),
    )?;
    if !study {
        return Err(AggregatorError::NotFound(format!(
            "study_id: no study `{study_id}`"
        )));
    }
    db.execute(
        "INSERT INTO reviewer_studies (name, study_id) VALUES (?1, ?2) ON CONFLICT DO NOTHING",
        &params![name, study_id],
    )?;
    Ok(())
}

/// Whether a reviewer account exists.
pub fn reviewer_exists(store: &Store, name: &str) -> Result<bool> {
    store.db().query_row(
        "SELECT EXISTS (SELECT 1 FROM reviewers WHERE name = ?1)",
        &params![name],
        |r| r.get(0),
    )
}

/// Checks a login. Unknown names cost one hash verification too, so the
/// answer time does not tell which names exist.
pub fn verify_login(store: &Store, name: &str, password: &str) -> Result<bool> {
    let stored: Option<String> = store.db().query_opt(
        "SELECT password_hash FROM reviewers WHERE name = ?1",
        &params![name],
        |r| r.get(0),
    )?;
    // A hash of a random password, verified against when the name is unknown.
    static DECOY: std::sync::LazyLock<String> = std::sync::LazyLock::new(|| {
        hash_password(&random_token()).expect("hashing a random token succeeds")
    });
    let phc = stored.as_deref().unwrap_or(DECOY.as_str());
    let parsed = PasswordHash::new(phc)
        .map_err(|e| AggregatorError::Corrupt(format!("password hash of `{name}`: {e}")))?;
    let ok = Argon2::default()
        .verify_password(password.as_bytes(), &parsed)
        .is_ok();
    Ok(ok && stored.is_some())
}

/// Starts a session for `name`; returns the cookie token (never stored).
pub fn create_session(store: &Store, name: &str, now_ms: i64) -> Result<String> {
    let token = random_token();
    let db = store.db();
    db.execute(
        "DELETE FROM review_sessions WHERE expires_ms <= ?1",
        &params![now_ms],
    )?;
    db.execute(
        "INSERT INTO review_sessions (token_hash, reviewer, csrf_token, created_ms, expires_ms)
         VALUES (?1, ?2, ?3, ?4, ?5)",
        &params![
            token_hash(&token),
            name,
            random_token(),
            now_ms,
            now_ms + SESSION_TTL_MS
        ],
    )?;
    Ok(token)
}

/// The live session for a cookie token, if any.
pub fn session(store: &Store, token: &str, now_ms: i64) -> Result<Option<Session>> {
    let db = store.db();
    let row: Option<(String, String)> = db.query_opt(
        "SELECT reviewer, csrf_token FROM review_sessions
         WHERE token_hash = ?1 AND expires_ms > ?2",
        &params![token_hash(token), now_ms],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )?;
    let Some((reviewer, csrf_token)) = row else {
        return Ok(None);
    };
    let studies = db.query_map(
        "SELECT study_id FROM reviewer_studies WHERE name = ?1 ORDER BY study_id",
        &params![reviewer],
        |r| r.get::<String>(0),
    )?;
    Ok(Some(Session {
        reviewer,
        csrf_token,
        studies,
    }))
}

/// Ends the session of a cookie token.
pub fn end_session(store: &Store, token: &str) -> Result<()> {
    store.db().execute(
        "DELETE FROM review_sessions WHERE token_hash = ?1",
        &params![token_hash(token)],
    )?;
    Ok(())
}

/// A random password for a generated account: 20 characters from an
/// alphabet without look-alikes (about 115 bits).
pub fn generate_password() -> String {
    random_readable(20)
}
