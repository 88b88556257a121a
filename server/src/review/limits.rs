//! Limits on failed sign-ins to the review pages, and their record.
//!
//! Two counters of failed password checks are kept: one per account name
//! (as typed, trimmed; unknown names are counted like known ones, so the
//! answers do not tell which names exist) and one per source address (the
//! peer's IP address; behind a reverse proxy that is the proxy's, and no
//! forwarding header is trusted). Once a counter reaches its number of free
//! failures, every further failure locks that name or address for a delay
//! that doubles per failure:
//!
//! ```text
//! delay(f) = min(first_delay · 2^(f − free), max_delay)   for f ≥ free failures
//! ```
//!
//! While locked, every sign-in for the name or from the address is answered
//! 429 with `Retry-After` (whole seconds, rounded up) **without checking the
//! password**, even a correct one, so a guesser learns nothing and costs no
//! Argon2 work. A refused attempt does not extend the lockout. A successful
//! sign-in clears its name's counter, not its address's (one valid account
//! must not reset the address that guesses others); a counter with no
//! failure for `forget_after` is forgotten. Attempts still being checked
//! count as failures when admitting another one, so many guesses sent at
//! once get at most the free number of password checks.
//!
//! Where the state lives: **in memory**, in the review server's process.
//! Counters are written on every failed attempt and read on every attempt;
//! keeping them in the database would add a write transaction per guess to
//! the aggregator's database during an attack. A restart forgets them (an
//! attacker cannot restart the server). With several review servers on one
//! PostgreSQL database, each counts its own: a guesser spread over `k`
//! servers gets up to `k` times the free failures (stated in the README).
//! Memory is bounded by forgetting idle counters; a flood of distinct names
//! from one address stops at that address's limit.
//!
//! The record: every failed check, every lockout begun and every successful
//! sign-in is appended to `review_login_events` (append-only, enforced by
//! triggers like `review_actions`) with the name typed (at most 64
//! characters), the source address and the time, and logged (`tracing`,
//! `warn` for failures and lockouts). Refusals during a lockout are logged
//! at `debug` only and not stored: an attack would otherwise write a row
//! per request.

use std::collections::HashMap;
use std::net::IpAddr;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use crate::error::Result;
use crate::params;
use crate::store::Store;

/// How failed sign-ins are limited. [`LoginLimits::default`] is the
/// production setting.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LoginLimits {
    /// Failures per name before the first lockout (that failure locks).
    pub account_free_failures: u32,
    /// Failures per source address before the first lockout. Higher than
    /// per name: several reviewers may share an address.
    pub address_free_failures: u32,
    /// The first lockout's length; each further failure doubles it.
    pub first_delay: Duration,
    /// The longest lockout.
    pub max_delay: Duration,
    /// A counter with no failure for this long is forgotten.
    pub forget_after: Duration,
}

impl Default for LoginLimits {
    /// 5 failures per name and 20 per address, then 15 s doubling to at
    /// most 15 min; forgotten after 1 h without a failure (common
    /// practice for interactive sign-in, chosen here, not from a standard).
    fn default() -> LoginLimits {
        LoginLimits {
            account_free_failures: 5,
            address_free_failures: 20,
            first_delay: Duration::from_secs(15),
            max_delay: Duration::from_secs(15 * 60),
            forget_after: Duration::from_secs(3600),
        }
    }
}

impl LoginLimits {
    /// The lockout after the `failures`-th failure of a counter whose free
    /// number is `free`, if any.
    pub fn delay_after(&self, failures: u32, free: u32) -> Option<Duration> {
        if failures < free.max(1) {
            return None;
        }
        let doublings = (failures - free.max(1)).min(30);
        let delay = self.first_delay.saturating_mul(1u32 << doublings);
        Some(delay.min(self.max_delay))
    }
}

/// What a lockout applies to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LockScope {
    Account,
    Address,
}

impl LockScope {
    pub fn as_str(self) -> &'static str {
        match self {
            LockScope::Account => "account",
            LockScope::Address => "address",
        }
    }
}

/// A lockout begun by a failure.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Lockout {
    pub scope: LockScope,
    pub delay: Duration,
    /// Failures counted when it began.
    pub failures: u32,
}

#[derive(Debug, Default)]
struct Counter {
    failures: u32,
    in_flight: u32,
    last_failure: Option<Instant>,
    locked_until: Option<Instant>,
}

impl Counter {
    fn idle(&self, now: Instant, forget_after: Duration) -> bool {
        self.in_flight == 0
            && self.locked_until.is_none_or(|t| t <= now)
            && self
                .last_failure
                .is_none_or(|t| now.duration_since(t) >= forget_after)
    }
}

#[derive(Debug)]
struct Counters<K> {
    map: HashMap<K, Counter>,
    prune_above: usize,
}

impl<K: std::hash::Hash + Eq + Clone> Counters<K> {
    fn new() -> Counters<K> {
        Counters {
            map: HashMap::new(),
            prune_above: PRUNE_FLOOR,
        }
    }

    /// The counter for `key`, forgetting it first if idle long enough, and
    /// forgetting every idle counter once the map has doubled since the last
    /// sweep (amortised O(1) per call).
    fn get(&mut self, key: &K, now: Instant, forget_after: Duration) -> &mut Counter {
        if self.map.len() > self.prune_above {
            self.map.retain(|_, c| !c.idle(now, forget_after));
            self.prune_above = (self.map.len() * 2).max(PRUNE_FLOOR);
        }
        let counter = self.map.entry(key.clone()).or_default();
        if counter.idle(now, forget_after) {
            *counter = Counter::default();
        }
        counter
    }
}

/// Below this many counters no sweep is made.
const PRUNE_FLOOR: usize = 4096;

/// Longest name kept as a key or stored in the record (names are at most
/// 64 characters, `study::valid_id`).
pub const MAX_NAME_CHARS: usize = 64;

/// The in-memory counters of one review server.
#[derive(Debug)]
pub struct LoginLimiter {
    limits: LoginLimits,
    state: Mutex<LimiterState>,
}

#[derive(Debug)]
struct LimiterState {
    accounts: Counters<String>,
    addresses: Counters<IpAddr>,
}

/// The name as counted and recorded: trimmed, at most [`MAX_NAME_CHARS`].
pub fn counted_name(name: &str) -> String {
    name.trim().chars().take(MAX_NAME_CHARS).collect()
}

fn retry_after(until: Instant, now: Instant) -> Duration {
    let remaining = until.saturating_duration_since(now);
    Duration::from_secs(remaining.as_secs() + u64::from(remaining.subsec_nanos() > 0))
}

impl LoginLimiter {
    pub fn new(limits: LoginLimits) -> LoginLimiter {
        LoginLimiter {
            limits,
            state: Mutex::new(LimiterState {
                accounts: Counters::new(),
                addresses: Counters::new(),
            }),
        }
    }

    pub fn limits(&self) -> &LoginLimits {
        &self.limits
    }

    /// Admits a sign-in attempt for `name` from `source`, or refuses it with
    /// the whole seconds to wait (at least 1). An admitted attempt holds a
    /// [`LoginTicket`] until its password check is reported.
    pub fn admit(
        self: &Arc<Self>,
        name: &str,
        source: IpAddr,
        now: Instant,
    ) -> std::result::Result<LoginTicket, Duration> {
        let name = counted_name(name);
        let limits = self.limits;
        let mut state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        let mut wait = Duration::ZERO;
        {
            let account = state.accounts.get(&name, now, limits.forget_after);
            wait = wait.max(admission_wait(
                account,
                limits.account_free_failures,
                &limits,
                now,
            ));
        }
        {
            let address = state.addresses.get(&source, now, limits.forget_after);
            wait = wait.max(admission_wait(
                address,
                limits.address_free_failures,
                &limits,
                now,
            ));
        }
        if !wait.is_zero() {
            return Err(wait);
        }
        state
            .accounts
            .get(&name, now, limits.forget_after)
            .in_flight += 1;
        state
            .addresses
            .get(&source, now, limits.forget_after)
            .in_flight += 1;
        Ok(LoginTicket {
            limiter: self.clone(),
            name,
            source,
            settled: false,
        })
    }

    /// How long `name` (counted form) or `source` is still locked, if at all.
    pub fn locked_for(&self, name: &str, source: IpAddr, now: Instant) -> Option<Duration> {
        let state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        let until = [
            state
                .accounts
                .map
                .get(&counted_name(name))
                .and_then(|c| c.locked_until),
            state
                .addresses
                .map
                .get(&source)
                .and_then(|c| c.locked_until),
        ]
        .into_iter()
        .flatten()
        .filter(|t| *t > now)
        .max()?;
        Some(retry_after(until, now))
    }
}

/// The wait before an attempt may be checked: the remaining lockout, or 1 s
/// when the attempts already being checked could reach the lockout.
fn admission_wait(counter: &Counter, free: u32, limits: &LoginLimits, now: Instant) -> Duration {
    if let Some(until) = counter.locked_until
        && until > now
    {
        return retry_after(until, now);
    }
    if counter.in_flight > 0
        && limits
            .delay_after(counter.failures + counter.in_flight, free)
            .is_some()
    {
        return Duration::from_secs(1);
    }
    Duration::ZERO
}

/// An admitted attempt. Dropping it without reporting (the request was
/// abandoned or the check failed to run) counts nothing.
#[derive(Debug)]
pub struct LoginTicket {
    limiter: Arc<LoginLimiter>,
    name: String,
    source: IpAddr,
    settled: bool,
}

impl LoginTicket {
    /// The name as counted and recorded.
    pub fn name(&self) -> &str {
        &self.name
    }

    pub fn source(&self) -> IpAddr {
        self.source
    }

    fn release(&mut self, state: &mut LimiterState) {
        if let Some(a) = state.accounts.map.get_mut(&self.name) {
            a.in_flight = a.in_flight.saturating_sub(1);
        }
        if let Some(s) = state.addresses.map.get_mut(&self.source) {
            s.in_flight = s.in_flight.saturating_sub(1);
        }
        self.settled = true;
    }

    /// The password was right: the name's counter is cleared.
    pub fn succeeded(mut self) {
        let limiter = self.limiter.clone();
        let mut state = limiter.state.lock().unwrap_or_else(|p| p.into_inner());
        self.release(&mut state);
        if let Some(c) = state.accounts.map.get_mut(&self.name) {
            *c = Counter {
                in_flight: c.in_flight,
                ..Counter::default()
            };
        }
    }

    /// The password was wrong: counts the failure on both counters and
    /// returns the lockouts it began (account first).
    pub fn failed(mut self, now: Instant) -> Vec<Lockout> {
        let limiter = self.limiter.clone();
        let limits = limiter.limits;
        let mut state = limiter.state.lock().unwrap_or_else(|p| p.into_inner());
        self.release(&mut state);
        let mut begun = Vec::new();
        let account = state.accounts.get(&self.name, now, limits.forget_after);
        if let Some(lockout) = count_failure(
            account,
            LockScope::Account,
            limits.account_free_failures,
            &limits,
            now,
        ) {
            begun.push(lockout);
        }
        let address = state.addresses.get(&self.source, now, limits.forget_after);
        if let Some(lockout) = count_failure(
            address,
            LockScope::Address,
            limits.address_free_failures,
            &limits,
            now,
        ) {
            begun.push(lockout);
        }
        begun
    }
}

fn count_failure(
    counter: &mut Counter,
    scope: LockScope,
    free: u32,
    limits: &LoginLimits,
    now: Instant,
) -> Option<Lockout> {
    counter.failures = counter.failures.saturating_add(1);
    counter.last_failure = Some(now);
    let delay = limits.delay_after(counter.failures, free)?;
    let until = now + delay;
    counter.locked_until = Some(counter.locked_until.map_or(until, |t| t.max(until)));
    Some(Lockout {
        scope,
        delay,
        failures: counter.failures,
    })
}

impl Drop for LoginTicket {
    fn drop(&mut self) {
        if !self.settled {
            let limiter = self.limiter.clone();
            let mut state = limiter.state.lock().unwrap_or_else(|p| p.into_inner());
            self.release(&mut state);
        }
    }
}

/// A kind of entry in the login record.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LoginEvent {
    Failure,
    Lockout,
    Success,
}

impl LoginEvent {
    pub fn as_str(self) -> &'static str {
        match self {
            LoginEvent::Failure => "failure",
            LoginEvent::Lockout => "lockout",
            LoginEvent::Success => "success",
        }
    }
}

/// One entry of the login record as stored.
#[derive(Debug, Clone, PartialEq)]
pub struct LoginRecord {
    pub at_ms: i64,
    pub name: String,
    pub source: String,
    pub event: String,
    pub detail: String,
}

/// Appends one entry to the login record.
pub fn record(
    store: &Store,
    at_ms: i64,
    name: &str,
    source: IpAddr,
    event: LoginEvent,
    detail: &str,
) -> Result<()> {
    store.db().execute(
        "INSERT INTO review_login_events (at_ms, name, source, event, detail)
         VALUES (?1, ?2, ?3, ?4, ?5)",
        &params![
            at_ms,
            counted_name(name),
            source.to_string(),
            event.as_str(),
            detail
        ],
    )?;
    Ok(())
}

/// The login record, oldest first.
pub fn records(store: &Store) -> Result<Vec<LoginRecord>> {
    store.db().query_map(
        "SELECT at_ms, name, source, event, detail FROM review_login_events ORDER BY event_id",
        &params![],
        |r| {
            Ok(LoginRecord {
                at_ms: r.get(0)?,
                name: r.get(1)?,
                source: r.get(2)?,
                event: r.get(3)?,
                detail: r.get(4)?,
            })
        },
    )
}

/// The text stored and logged for a lockout.
pub fn lockout_detail(lockout: &Lockout) -> String {
    format!(
        "{} locked for {} s after {} failed sign-ins",
        lockout.scope.as_str(),
        lockout.delay.as_secs(),
        lockout.failures
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits() -> LoginLimits {
        LoginLimits {
            account_free_failures: 3,
            address_free_failures: 5,
            first_delay: Duration::from_secs(10),
            max_delay: Duration::from_secs(60),
            forget_after: Duration::from_secs(600),
        }
    }

    #[test]
    fn delays_double_from_the_free_number_up_to_the_cap() {
        // The rule in the module doc: 10 s at the 3rd failure, doubling, capped at 60 s.
        let l = limits();
        let got: Vec<Option<u64>> = (1..=8)
            .map(|f| l.delay_after(f, 3).map(|d| d.as_secs()))
            .collect();
        assert_eq!(
            got,
            [
                None,
                None,
                Some(10),
                Some(20),
                Some(40),
                Some(60),
                Some(60),
                Some(60)
            ]
        );
    }

    #[test]
    fn a_lockout_refuses_until_it_ends_and_a_success_clears_the_name() {
        let limiter = Arc::new(LoginLimiter::new(limits()));
        let ip: IpAddr = "192.0.2.7".parse().unwrap();
        let t0 = Instant::now();
        for k in 1..=3 {
            let ticket = limiter.admit("ana", ip, t0).unwrap();
            let begun = ticket.failed(t0);
            assert_eq!(begun.len(), usize::from(k == 3), "failure {k}");
        }
        assert_eq!(
            limiter.admit("ana", ip, t0).unwrap_err(),
            Duration::from_secs(10)
        );
        assert_eq!(
            limiter
                .admit("ana", ip, t0 + Duration::from_millis(9_500))
                .unwrap_err(),
            Duration::from_secs(1),
            "rounded up"
        );
        let later = t0 + Duration::from_secs(10);
        limiter.admit("ana", ip, later).unwrap().succeeded();
        let ticket = limiter.admit("ana", ip, later).unwrap();
        assert!(ticket.failed(later).is_empty(), "counter cleared");
    }

    #[test]
    fn attempts_in_flight_count_against_the_limit_and_dropping_releases_them() {
        let limiter = Arc::new(LoginLimiter::new(limits()));
        let ip: IpAddr = "192.0.2.8".parse().unwrap();
        let t0 = Instant::now();
        let held: Vec<LoginTicket> = (0..3)
            .map(|_| limiter.admit("bo", ip, t0).unwrap())
            .collect();
        assert!(limiter.admit("bo", ip, t0).is_err(), "3 in flight reach 3");
        drop(held);
        assert!(limiter.admit("bo", ip, t0).is_ok(), "released");
    }

    #[test]
    fn the_address_counter_spans_names_and_survives_a_success() {
        let limiter = Arc::new(LoginLimiter::new(limits()));
        let ip: IpAddr = "192.0.2.9".parse().unwrap();
        let t0 = Instant::now();
        for k in 0..4 {
            let begun = limiter.admit(&format!("n{k}"), ip, t0).unwrap().failed(t0);
            assert!(begun.is_empty());
        }
        limiter.admit("real", ip, t0).unwrap().succeeded();
        let begun = limiter.admit("n9", ip, t0).unwrap().failed(t0);
        assert_eq!(begun[0].scope, LockScope::Address);
        assert!(limiter.admit("real", ip, t0).is_err());
        let other: IpAddr = "192.0.2.10".parse().unwrap();
        assert!(limiter.admit("real", other, t0).is_ok());
    }

    #[test]
    fn idle_counters_are_forgotten() {
        let limiter = Arc::new(LoginLimiter::new(limits()));
        let ip: IpAddr = "192.0.2.11".parse().unwrap();
        let t0 = Instant::now();
        for _ in 0..2 {
            limiter.admit("cy", ip, t0).unwrap().failed(t0);
        }
        let later = t0 + Duration::from_secs(600);
        let begun = limiter.admit("cy", ip, later).unwrap().failed(later);
        assert!(begun.is_empty(), "two failures an hour ago are forgotten");
    }

    #[test]
    fn the_login_record_is_append_only() {
        let store = Store::in_memory().unwrap();
        let ip: IpAddr = "192.0.2.12".parse().unwrap();
        let long = "x".repeat(200);
        record(&store, 5, &long, ip, LoginEvent::Failure, "wrong").unwrap();
        let got = records(&store).unwrap();
        assert_eq!(got.len(), 1);
        assert_eq!(
            got[0].name.chars().count(),
            MAX_NAME_CHARS,
            "name cut to 64"
        );
        assert_eq!(got[0].source, "192.0.2.12");
        let db = store.db();
        assert!(
            db.execute(
                "UPDATE review_login_events SET event = 'success'",
                &params![]
            )
            .is_err()
        );
        assert!(
            db.execute("DELETE FROM review_login_events", &params![])
                .is_err()
        );
    }
}
