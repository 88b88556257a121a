//! One connection type over the aggregator's two databases: embedded SQLite
//! (the default) and PostgreSQL (`--db postgres://…`, for a study served by
//! several aggregator processes).
//!
//! The store ([`crate::store`]) and the review pages write their queries once,
//! in the SQL both databases accept (`?N` placeholders, `ON CONFLICT`,
//! `RETURNING`, `COALESCE`, `CAST(… AS BIGINT)`); [`Db`] runs them on either.
//! What differs lives here and in the schema: placeholders become `$N` for
//! PostgreSQL, integers are `BIGINT` there (SQLite's `INTEGER`), booleans are
//! stored as 0/1 integers in both, and the append-only triggers are written
//! in each database's own language.
//!
//! PostgreSQL is reached through `tokio-postgres`. The coordinator's state
//! machine is synchronous under one lock, so a call waits for its answer:
//! the connection's I/O runs on a thread of its own (its own single-thread
//! Tokio runtime) and the calling thread blocks on the reply, inside or
//! outside an async runtime (`futures_executor::block_on`: the client's
//! requests travel over channels, not the caller's runtime).

use std::collections::HashMap;
use std::fmt;
use std::sync::Mutex;

use crate::error::{AggregatorError, Result};

/// A database failure, with whether it was a uniqueness violation (another
/// writer got there first: two replicas opening the same round, say).
#[derive(Debug, Clone)]
pub struct DbError {
    pub message: String,
    pub unique_violation: bool,
}

impl fmt::Display for DbError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for DbError {}

impl From<rusqlite::Error> for DbError {
    fn from(e: rusqlite::Error) -> Self {
        let unique_violation = matches!(
            &e,
            rusqlite::Error::SqliteFailure(f, _)
                if f.extended_code == rusqlite::ffi::SQLITE_CONSTRAINT_PRIMARYKEY
                    || f.extended_code == rusqlite::ffi::SQLITE_CONSTRAINT_UNIQUE
        );
        DbError {
            message: e.to_string(),
            unique_violation,
        }
    }
}

impl From<tokio_postgres::Error> for DbError {
    fn from(e: tokio_postgres::Error) -> Self {
        let unique_violation = e.code() == Some(&tokio_postgres::error::SqlState::UNIQUE_VIOLATION);
        // The server's message (with its detail) says more than the client's summary.
        let message = match e.as_db_error() {
            Some(db) => match db.detail() {
                Some(detail) => format!("{} ({detail})", db.message()),
                None => db.message().to_string(),
            },
            None => e.to_string(),
        };
        DbError {
            message,
            unique_violation,
        }
    }
}

impl From<rusqlite::Error> for AggregatorError {
    fn from(e: rusqlite::Error) -> Self {
        AggregatorError::Database(e.into())
    }
}

impl From<tokio_postgres::Error> for AggregatorError {
    fn from(e: tokio_postgres::Error) -> Self {
        AggregatorError::Database(e.into())
    }
}

/// A value passed to or read from a query.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
    Blob(Vec<u8>),
}

/// What can be passed as a query parameter.
pub trait ToValue {
    fn to_value(&self) -> Value;
}

impl ToValue for Value {
    fn to_value(&self) -> Value {
        self.clone()
    }
}
impl ToValue for i64 {
    fn to_value(&self) -> Value {
        Value::Int(*self)
    }
}
impl ToValue for i32 {
    fn to_value(&self) -> Value {
        Value::Int(i64::from(*self))
    }
}
impl ToValue for u32 {
    fn to_value(&self) -> Value {
        Value::Int(i64::from(*self))
    }
}
impl ToValue for bool {
    fn to_value(&self) -> Value {
        Value::Int(i64::from(*self))
    }
}
impl ToValue for f64 {
    fn to_value(&self) -> Value {
        Value::Real(*self)
    }
}
impl ToValue for str {
    fn to_value(&self) -> Value {
        Value::Text(self.to_string())
    }
}
impl ToValue for String {
    fn to_value(&self) -> Value {
        Value::Text(self.clone())
    }
}
impl ToValue for [u8] {
    fn to_value(&self) -> Value {
        Value::Blob(self.to_vec())
    }
}
impl ToValue for Vec<u8> {
    fn to_value(&self) -> Value {
        Value::Blob(self.clone())
    }
}
impl<T: ToValue + ?Sized> ToValue for &T {
    fn to_value(&self) -> Value {
        (**self).to_value()
    }
}
impl<T: ToValue> ToValue for Option<T> {
    fn to_value(&self) -> Value {
        self.as_ref().map_or(Value::Null, ToValue::to_value)
    }
}

/// Query parameters: `params![a, b]` is `[Value; 2]`.
#[macro_export]
macro_rules! params {
    () => { [$crate::db::Value::Null; 0] };
    ($($x:expr),+ $(,)?) => { [$($crate::db::ToValue::to_value(&$x)),+] };
}
pub use crate::params;

/// What a column can be read as.
pub trait FromValue: Sized {
    fn from_value(v: &Value) -> Option<Self>;
}
impl FromValue for i64 {
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Int(i) => Some(*i),
            _ => None,
        }
    }
}
impl FromValue for u64 {
    fn from_value(v: &Value) -> Option<Self> {
        i64::from_value(v).and_then(|i| u64::try_from(i).ok())
    }
}
impl FromValue for u32 {
    fn from_value(v: &Value) -> Option<Self> {
        i64::from_value(v).and_then(|i| u32::try_from(i).ok())
    }
}
impl FromValue for bool {
    fn from_value(v: &Value) -> Option<Self> {
        i64::from_value(v).map(|i| i != 0)
    }
}
impl FromValue for f64 {
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Real(x) => Some(*x),
            Value::Int(i) => Some(*i as f64),
            _ => None,
        }
    }
}
impl FromValue for String {
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Text(s) => Some(s.clone()),
            _ => None,
        }
    }
}
impl FromValue for Vec<u8> {
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Blob(b) => Some(b.clone()),
            _ => None,
        }
    }
}
impl<T: FromValue> FromValue for Option<T> {
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Null => Some(None),
            other => T::from_value(other).map(Some),
        }
    }
}

/// One result row.
#[derive(Debug, Clone)]
pub struct Row(Vec<Value>);

impl Row {
    /// Column `i` as a `T`; a stored value of another type is a corrupt state.
    pub fn get<T: FromValue>(&self, i: usize) -> Result<T> {
        let v = self.0.get(i).ok_or_else(|| {
            AggregatorError::Corrupt(format!("a query read column {i} of {}", self.0.len()))
        })?;
        T::from_value(v).ok_or_else(|| {
            AggregatorError::Corrupt(format!(
                "column {i} holds {v:?}, not a {}",
                std::any::type_name::<T>()
            ))
        })
    }
}

/// Which database a connection is on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dialect {
    Sqlite,
    Postgres,
}

/// A connection to the aggregator's database.
pub struct Db {
    inner: Inner,
}

enum Inner {
    Sqlite(rusqlite::Connection),
    Postgres(Pg),
}

impl fmt::Debug for Db {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Db")
            .field("dialect", &self.dialect())
            .finish()
    }
}

/// Whether `location` names a PostgreSQL database (`postgres://` or
/// `postgresql://`) rather than a SQLite file.
pub fn is_postgres_url(location: &str) -> bool {
    location.starts_with("postgres://") || location.starts_with("postgresql://")
}

impl Db {
    pub fn sqlite(conn: rusqlite::Connection) -> Db {
        Db {
            inner: Inner::Sqlite(conn),
        }
    }

    /// Connects to PostgreSQL at `url` (a libpq-style URL, without TLS:
    /// loopback or a private network).
    pub fn postgres(url: &str) -> Result<Db> {
        Ok(Db {
            inner: Inner::Postgres(Pg::connect(url)?),
        })
    }

    pub fn dialect(&self) -> Dialect {
        match self.inner {
            Inner::Sqlite(_) => Dialect::Sqlite,
            Inner::Postgres(_) => Dialect::Postgres,
        }
    }

    /// The SQLite connection, for SQLite-only work (its pragmas, older schemas).
    pub(crate) fn sqlite_conn(&self) -> Option<&rusqlite::Connection> {
        match &self.inner {
            Inner::Sqlite(c) => Some(c),
            Inner::Postgres(_) => None,
        }
    }

    /// Runs statements without parameters, separated by `;`.
    pub fn execute_batch(&self, sql: &str) -> Result<()> {
        match &self.inner {
            Inner::Sqlite(c) => Ok(c.execute_batch(sql)?),
            Inner::Postgres(pg) => pg.batch(sql),
        }
    }

    /// Runs one statement; returns the number of rows it changed.
    pub fn execute(&self, sql: &str, params: &[Value]) -> Result<u64> {
        match &self.inner {
            Inner::Sqlite(c) => {
                let mut stmt = c.prepare_cached(sql)?;
                Ok(stmt.execute(rusqlite::params_from_iter(params.iter()))? as u64)
            }
            Inner::Postgres(pg) => pg.execute(sql, params),
        }
    }

    /// Every row of a query, each mapped by `f`.
    pub fn query_map<T>(
        &self,
        sql: &str,
        params: &[Value],
        mut f: impl FnMut(&Row) -> Result<T>,
    ) -> Result<Vec<T>> {
        self.rows(sql, params)?.iter().map(&mut f).collect()
    }

    /// The first row of a query mapped by `f`, or `None` when there is none.
    pub fn query_opt<T>(
        &self,
        sql: &str,
        params: &[Value],
        f: impl FnOnce(&Row) -> Result<T>,
    ) -> Result<Option<T>> {
        self.rows(sql, params)?.first().map(f).transpose()
    }

    /// The first row of a query mapped by `f`; no row is an error.
    pub fn query_row<T>(
        &self,
        sql: &str,
        params: &[Value],
        f: impl FnOnce(&Row) -> Result<T>,
    ) -> Result<T> {
        self.query_opt(sql, params, f)?.ok_or_else(|| {
            AggregatorError::Corrupt(format!("a query that returns one row returned none: {sql}"))
        })
    }

    fn rows(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>> {
        match &self.inner {
            Inner::Sqlite(c) => {
                let mut stmt = c.prepare_cached(sql)?;
                let n = stmt.column_count();
                let mut rows = stmt.query(rusqlite::params_from_iter(params.iter()))?;
                let mut out = Vec::new();
                while let Some(r) = rows.next()? {
                    let mut values = Vec::with_capacity(n);
                    for i in 0..n {
                        values.push(match r.get_ref(i)? {
                            rusqlite::types::ValueRef::Null => Value::Null,
                            rusqlite::types::ValueRef::Integer(i) => Value::Int(i),
                            rusqlite::types::ValueRef::Real(x) => Value::Real(x),
                            rusqlite::types::ValueRef::Text(t) => {
                                Value::Text(String::from_utf8_lossy(t).into_owned())
                            }
                            rusqlite::types::ValueRef::Blob(b) => Value::Blob(b.to_vec()),
                        });
                    }
                    out.push(Row(values));
                }
                Ok(out)
            }
            Inner::Postgres(pg) => pg.query(sql, params),
        }
    }

    /// Starts a transaction; it rolls back unless [`Tx::commit`] is called.
    /// On SQLite it takes the write lock at once (`BEGIN IMMEDIATE`), so two
    /// processes on one file wait for each other instead of failing late.
    pub fn transaction(&mut self) -> Result<Tx<'_>> {
        self.execute_batch(match self.dialect() {
            Dialect::Sqlite => "BEGIN IMMEDIATE",
            Dialect::Postgres => "BEGIN",
        })?;
        Ok(Tx {
            db: self,
            open: true,
        })
    }
}

impl rusqlite::ToSql for Value {
    fn to_sql(&self) -> rusqlite::Result<rusqlite::types::ToSqlOutput<'_>> {
        use rusqlite::types::{ToSqlOutput, ValueRef};
        Ok(ToSqlOutput::Borrowed(match self {
            Value::Null => ValueRef::Null,
            Value::Int(i) => ValueRef::Integer(*i),
            Value::Real(x) => ValueRef::Real(*x),
            Value::Text(s) => ValueRef::Text(s.as_bytes()),
            Value::Blob(b) => ValueRef::Blob(b),
        }))
    }
}

/// An open transaction; dropped without [`Tx::commit`], it rolls back.
#[derive(Debug)]
pub struct Tx<'a> {
    db: &'a mut Db,
    open: bool,
}

impl Tx<'_> {
    pub fn commit(mut self) -> Result<()> {
        self.open = false;
        self.db.execute_batch("COMMIT")
    }
}

impl std::ops::Deref for Tx<'_> {
    type Target = Db;
    fn deref(&self) -> &Db {
        self.db
    }
}

impl Drop for Tx<'_> {
    fn drop(&mut self) {
        if self.open
            && let Err(e) = self.db.execute_batch("ROLLBACK")
        {
            tracing::warn!(error = %e, "rolling back a transaction failed");
        }
    }
}

/// `?N` placeholders as PostgreSQL's `$N` (a bare `?` takes the next
/// number), outside quoted strings.
fn to_postgres_placeholders(sql: &str) -> String {
    let mut out = String::with_capacity(sql.len() + 8);
    let mut chars = sql.chars().peekable();
    let mut quoted = false;
    let mut next = 1;
    while let Some(c) = chars.next() {
        match c {
            '\'' => {
                quoted = !quoted;
                out.push(c);
            }
            '?' if !quoted => {
                let mut digits = String::new();
                while let Some(d) = chars.peek().copied().filter(char::is_ascii_digit) {
                    digits.push(d);
                    chars.next();
                }
                if digits.is_empty() {
                    digits = next.to_string();
                }
                next = digits.parse::<usize>().unwrap_or(next) + 1;
                out.push('$');
                out.push_str(&digits);
            }
            _ => out.push(c),
        }
    }
    out
}

/// A PostgreSQL connection: the client, its prepared statements by SQL, and
/// the thread that drives the connection's I/O.
struct Pg {
    client: tokio_postgres::Client,
    statements: Mutex<HashMap<String, tokio_postgres::Statement>>,
}

impl Pg {
    fn connect(url: &str) -> Result<Pg> {
        let config: tokio_postgres::Config = url.parse().map_err(|e| {
            // The URL may hold a password: it is not repeated.
            AggregatorError::invalid("--db", format!("not a valid PostgreSQL URL: {e}"))
        })?;
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::Builder::new()
            .name("plimsoll-postgres".into())
            .spawn(move || {
                let rt = match tokio::runtime::Builder::new_current_thread()
                    .enable_all()
                    .build()
                {
                    Ok(rt) => rt,
                    Err(e) => {
                        let _ = tx.send(Err(format!("starting the connection's runtime: {e}")));
                        return;
                    }
                };
                rt.block_on(async move {
                    match config.connect(tokio_postgres::NoTls).await {
                        Ok((client, connection)) => {
                            let _ = tx.send(Ok(client));
                            if let Err(e) = connection.await {
                                tracing::error!(error = %e, "the PostgreSQL connection failed");
                            }
                        }
                        Err(e) => {
                            let _ = tx.send(Err(DbError::from(e).message));
                        }
                    }
                });
            })
            .map_err(|e| AggregatorError::Database(io_error("starting a thread", &e)))?;
        let client = rx
            .recv()
            .map_err(|_| {
                AggregatorError::Database(DbError {
                    message: "the PostgreSQL connection thread ended".into(),
                    unique_violation: false,
                })
            })?
            .map_err(|message| {
                AggregatorError::Database(DbError {
                    message: format!("connecting to PostgreSQL: {message}"),
                    unique_violation: false,
                })
            })?;
        Ok(Pg {
            client,
            statements: Mutex::new(HashMap::new()),
        })
    }

    fn batch(&self, sql: &str) -> Result<()> {
        Ok(futures_executor::block_on(self.client.batch_execute(sql))?)
    }

    fn statement(&self, sql: &str) -> Result<tokio_postgres::Statement> {
        let mut cache = self.statements.lock().unwrap_or_else(|p| p.into_inner());
        if let Some(s) = cache.get(sql) {
            return Ok(s.clone());
        }
        let s = futures_executor::block_on(self.client.prepare(&to_postgres_placeholders(sql)))?;
        cache.insert(sql.to_string(), s.clone());
        Ok(s)
    }

    fn execute(&self, sql: &str, params: &[Value]) -> Result<u64> {
        let stmt = self.statement(sql)?;
        let refs: Vec<&(dyn tokio_postgres::types::ToSql + Sync)> =
            params.iter().map(|p| p as _).collect();
        Ok(futures_executor::block_on(
            self.client.execute(&stmt, &refs),
        )?)
    }

    fn query(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>> {
        use tokio_postgres::types::Type;
        let stmt = self.statement(sql)?;
        let refs: Vec<&(dyn tokio_postgres::types::ToSql + Sync)> =
            params.iter().map(|p| p as _).collect();
        let rows = futures_executor::block_on(self.client.query(&stmt, &refs))?;
        rows.iter()
            .map(|r| {
                let mut values = Vec::with_capacity(r.len());
                for (i, col) in r.columns().iter().enumerate() {
                    let ty = col.type_();
                    let v = if *ty == Type::INT8 {
                        r.try_get::<_, Option<i64>>(i)?.map(Value::Int)
                    } else if *ty == Type::INT4 {
                        r.try_get::<_, Option<i32>>(i)?
                            .map(|x| Value::Int(i64::from(x)))
                    } else if *ty == Type::INT2 {
                        r.try_get::<_, Option<i16>>(i)?
                            .map(|x| Value::Int(i64::from(x)))
                    } else if *ty == Type::BOOL {
                        r.try_get::<_, Option<bool>>(i)?
                            .map(|x| Value::Int(i64::from(x)))
                    } else if *ty == Type::FLOAT8 {
                        r.try_get::<_, Option<f64>>(i)?.map(Value::Real)
                    } else if *ty == Type::FLOAT4 {
                        r.try_get::<_, Option<f32>>(i)?
                            .map(|x| Value::Real(f64::from(x)))
                    } else if *ty == Type::BYTEA {
                        r.try_get::<_, Option<Vec<u8>>>(i)?.map(Value::Blob)
                    } else {
                        r.try_get::<_, Option<String>>(i)?.map(Value::Text)
                    };
                    values.push(v.unwrap_or(Value::Null));
                }
                Ok(Row(values))
            })
            .collect()
    }
}

fn io_error(what: &str, e: &std::io::Error) -> DbError {
    DbError {
        message: format!("{what}: {e}"),
        unique_violation: false,
    }
}

impl tokio_postgres::types::ToSql for Value {
    fn to_sql(
        &self,
        ty: &tokio_postgres::types::Type,
        out: &mut bytes::BytesMut,
    ) -> std::result::Result<tokio_postgres::types::IsNull, Box<dyn std::error::Error + Sync + Send>>
    {
        use tokio_postgres::types::{IsNull, Type};
        match self {
            Value::Null => Ok(IsNull::Yes),
            Value::Int(i) if *ty == Type::INT4 => i32::try_from(*i)?.to_sql(ty, out),
            Value::Int(i) if *ty == Type::INT2 => i16::try_from(*i)?.to_sql(ty, out),
            Value::Int(i) if *ty == Type::BOOL => (*i != 0).to_sql(ty, out),
            Value::Int(i) if *ty == Type::FLOAT8 => (*i as f64).to_sql(ty, out),
            Value::Int(i) => i.to_sql(ty, out),
            Value::Real(x) => x.to_sql(ty, out),
            Value::Text(s) => s.to_sql(ty, out),
            Value::Blob(b) => b.to_sql(ty, out),
        }
    }

    fn accepts(_ty: &tokio_postgres::types::Type) -> bool {
        true
    }

    tokio_postgres::types::to_sql_checked!();
}

/// For the project's tests: the PostgreSQL test cluster's admin URL
/// (`PLIMSOLL_TEST_POSTGRES`, which `scripts/test` sets), or `None` with a loud
/// note on standard error when there is none. Under `scripts/test`
/// (`PLIMSOLL_REQUIRE_POSTGRES`) a missing cluster panics instead: CI never
/// skips the PostgreSQL tests.
#[doc(hidden)]
pub fn test_cluster(test: &str) -> Option<String> {
    match std::env::var("PLIMSOLL_TEST_POSTGRES") {
        Ok(url) if !url.is_empty() => Some(url),
        _ if std::env::var_os("PLIMSOLL_REQUIRE_POSTGRES").is_some() => {
            panic!(
                "{test}: PLIMSOLL_TEST_POSTGRES is not set, but scripts/test requires PostgreSQL"
            )
        }
        _ => {
            eprintln!(
                "\n*** SKIPPED {test} on PostgreSQL: no test cluster. Run scripts/test, or \
                 eval \"$(scripts/postgres-cluster.sh start)\" first. ***\n"
            );
            None
        }
    }
}

/// For the project's tests: the URL of database `name` on the test cluster,
/// created empty if it does not exist yet.
#[doc(hidden)]
pub fn test_database_named(name: &str) -> String {
    let admin = test_cluster(name).expect("a PostgreSQL test cluster");
    let db = Db::postgres(&admin).expect("connect to the test cluster");
    let exists = db
        .query_row(
            "SELECT COUNT(*) FROM pg_database WHERE datname = ?1",
            &params![name],
            |r| r.get::<i64>(0),
        )
        .expect("list the databases");
    if exists == 0 {
        match db.execute_batch(&format!("CREATE DATABASE {name}")) {
            // Two tests creating the same database at once: the other one made it.
            Err(e) if !e.to_string().contains("already exists") => {
                panic!("creating database {name}: {e}")
            }
            _ => {}
        }
    }
    let (base, _) = admin
        .rsplit_once('/')
        .expect("a URL ending in a database name");
    format!("{base}/{name}")
}

/// For the project's tests: a new, empty database on the test cluster for one
/// test, or `None` (skipped, see [`test_cluster`]).
#[doc(hidden)]
pub fn test_database(test: &str) -> Option<String> {
    use std::sync::atomic::{AtomicU32, Ordering};
    static NEXT: AtomicU32 = AtomicU32::new(0);
    test_cluster(test)?;
    let unique = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis());
    Some(test_database_named(&format!(
        "{test}_{}_{unique}_{}",
        std::process::id(),
        NEXT.fetch_add(1, Ordering::Relaxed)
    )))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Source: PostgreSQL 15 manual, "PREPARE" (parameters are `$1`, `$2`, …) and
    /// SQLite's "Parameters" (`?NNN`, and a bare `?` takes the next number).
    #[test]
    fn placeholders_become_numbered_dollars_outside_strings() {
        assert_eq!(
            to_postgres_placeholders("SELECT a FROM t WHERE b = ?1 AND c = ?2 OR d = ?1"),
            "SELECT a FROM t WHERE b = $1 AND c = $2 OR d = $1"
        );
        assert_eq!(
            to_postgres_placeholders("INSERT INTO t VALUES (?, ?, '?')"),
            "INSERT INTO t VALUES ($1, $2, '?')"
        );
        assert_eq!(
            to_postgres_placeholders("VALUES (?10, ?)"),
            "VALUES ($10, $11)"
        );
    }

    #[test]
    fn a_sqlite_transaction_rolls_back_unless_committed() {
        let mut db = Db::sqlite(rusqlite::Connection::open_in_memory().unwrap());
        db.execute_batch("CREATE TABLE t (x INTEGER)").unwrap();
        {
            let tx = db.transaction().unwrap();
            tx.execute("INSERT INTO t VALUES (?1)", &params![1])
                .unwrap();
        }
        let tx = db.transaction().unwrap();
        tx.execute("INSERT INTO t VALUES (?1)", &params![2])
            .unwrap();
        tx.commit().unwrap();
        let xs = db
            .query_map("SELECT x FROM t", &params![], |r| r.get::<i64>(0))
            .unwrap();
        assert_eq!(xs, [2]);
    }
}
