//! The aggregator's one error type. Every kind maps to exactly one gRPC code
//! in `wire::to_status`.

/// Why an aggregator operation failed. Messages name the field or entity.
#[derive(Debug, thiserror::Error)]
pub enum AggregatorError {
    /// A request field is malformed (INVALID_ARGUMENT).
    #[error("{field}: {reason}")]
    InvalidArgument { field: String, reason: String },
    /// A study or device does not exist (NOT_FOUND).
    #[error("{0}")]
    NotFound(String),
    /// The request is well formed but not valid now (FAILED_PRECONDITION).
    #[error("{0}")]
    FailedPrecondition(String),
    /// The same thing was already done differently (ALREADY_EXISTS).
    #[error("{0}")]
    AlreadyExists(String),
    /// No credential, or a wrong one: the enrollment code or the device
    /// secret (UNAUTHENTICATED).
    #[error("{0}")]
    Unauthenticated(String),
    /// The caller is known but may not do this: a revoked device, a device
    /// of another study, a request for another device (PERMISSION_DENIED).
    #[error("{0}")]
    PermissionDenied(String),
    /// The database (SQLite or PostgreSQL) failed.
    #[error("database: {0}")]
    Database(crate::db::DbError),
    /// The transaction this call's change shared with others (a group commit) failed, so
    /// nothing of it was applied; the message is the database's.
    #[error("database: {0}")]
    Unapplied(String),
    /// Another aggregator process on the same database changed the state first (closed the
    /// round, opened the next one); this one re-reads the state (ABORTED: try again).
    #[error("{0}")]
    Superseded(String),
    /// Stored state could not be decoded.
    #[error("stored state is corrupt: {0}")]
    Corrupt(String),
}

impl AggregatorError {
    /// Whether this is a database uniqueness violation (another writer inserted the row).
    pub fn is_unique_violation(&self) -> bool {
        matches!(self, AggregatorError::Database(e) if e.unique_violation)
    }

    pub fn invalid(field: impl Into<String>, reason: impl Into<String>) -> Self {
        AggregatorError::InvalidArgument {
            field: field.into(),
            reason: reason.into(),
        }
    }
}

pub type Result<T> = std::result::Result<T, AggregatorError>;
