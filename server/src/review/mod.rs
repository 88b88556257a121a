//! Clinician review of flag packets, served over HTTP by the aggregator
//! process: study overview, the episode queue (one row per episode), one
//! episode with every involved signal's chart and departure, and reviewer
//! actions on the episode kept as an append-only audit trail.
//!
//! Access: reviewer accounts are made on the command line
//! (`plimsoll-aggregator reviewer add|assign`); a reviewer logs in with a
//! password (Argon2id), gets an HttpOnly, SameSite=Strict session cookie and
//! sees only the studies assigned to them. Failed sign-ins are limited per
//! name and per source address with growing lockouts (429 with
//! `Retry-After`) and recorded ([`limits`]). Every state-changing form carries
//! the session's CSRF token. Pages load nothing from the network and run no
//! script; charts are inline SVG with a table as text alternative.
//!
//! This module reads the database through its own connection (WAL lets it
//! run beside the coordinator's). It never sees a model: packets are plain
//! numbers computed on devices.

pub mod accounts;
pub mod charts;
pub mod db;
pub mod html;
pub mod limits;
pub mod pages;

use std::net::SocketAddr;
use std::path::Path;
use std::sync::{Arc, Mutex};
use std::time::Instant;

use axum::Router;
use axum::extract::connect_info::Connected;
use axum::extract::{ConnectInfo, Form, Path as UrlPath, Query, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use serde::Deserialize;
use tokio::net::TcpListener;

use self::accounts::Session;
use self::db::{QueueFilter, ReviewAction, ReviewStatus};
use self::limits::{LoginEvent, LoginLimiter, LoginLimits};
use crate::error::{AggregatorError, Result};
use crate::packets::FlagLevel;
use crate::service::now_ms;
use crate::store::Store;
use crate::tls::{TlsIdentity, TlsListener};

/// Name of the session cookie.
pub const SESSION_COOKIE: &str = "plimsoll_review";

/// Name of the reviewer [`ensure_demo_reviewer`] creates.
pub const DEMO_REVIEWER: &str = "demo-reviewer";

/// Shared state of the review server: one database connection.
#[derive(Debug)]
pub struct ReviewState {
    store: Mutex<Store>,
    /// Mark session cookies `Secure` (pages served over TLS).
    secure_cookies: bool,
    /// Failed sign-ins per name and per source address.
    limiter: Arc<LoginLimiter>,
}

impl ReviewState {
    pub fn new(store: Store) -> ReviewState {
        ReviewState {
            store: Mutex::new(store),
            secure_cookies: false,
            limiter: Arc::new(LoginLimiter::new(LoginLimits::default())),
        }
    }

    /// Limits failed sign-ins by `limits` instead of the default.
    pub fn with_login_limits(mut self, limits: LoginLimits) -> ReviewState {
        self.limiter = Arc::new(LoginLimiter::new(limits));
        self
    }

    /// Marks session cookies `Secure`, so browsers send them only over TLS.
    pub fn with_secure_cookies(mut self, secure: bool) -> ReviewState {
        self.secure_cookies = secure;
        self
    }

    fn cookie_attributes(&self) -> &'static str {
        if self.secure_cookies {
            "Path=/; HttpOnly; SameSite=Strict; Secure"
        } else {
            "Path=/; HttpOnly; SameSite=Strict"
        }
    }

    /// Runs `f` on the connection off the async workers.
    async fn with_store<T: Send + 'static>(
        self: &Arc<Self>,
        f: impl FnOnce(&mut Store) -> Result<T> + Send + 'static,
    ) -> std::result::Result<T, Response> {
        let state = self.clone();
        let joined = tokio::task::spawn_blocking(move || {
            let mut store = state.store.lock().unwrap_or_else(|p| p.into_inner());
            f(&mut store)
        })
        .await;
        match joined {
            Ok(Ok(v)) => Ok(v),
            Ok(Err(e)) => Err(failure(e)),
            Err(e) => {
                tracing::error!(error = %e, "review worker failed");
                Err(html(
                    StatusCode::INTERNAL_SERVER_ERROR,
                    pages::error(
                        None,
                        "Something went wrong",
                        "The review server failed; nothing was changed.",
                    ),
                ))
            }
        }
    }
}

fn failure(e: AggregatorError) -> Response {
    match e {
        AggregatorError::InvalidArgument { .. } => html(
            StatusCode::BAD_REQUEST,
            pages::error(None, "Request not valid", &e.to_string()),
        ),
        other => {
            tracing::error!(error = %other, "review request failed");
            html(
                StatusCode::INTERNAL_SERVER_ERROR,
                pages::error(
                    None,
                    "Something went wrong",
                    "The review server could not read or write its database; nothing was changed.",
                ),
            )
        }
    }
}

/// Headers every response carries: no caching, no framing, nothing loaded
/// from elsewhere, no script.
fn secure(mut response: Response) -> Response {
    let h = response.headers_mut();
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(
            "default-src 'none'; style-src 'unsafe-inline'; img-src data:; form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
        ),
    );
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(header::X_FRAME_OPTIONS, HeaderValue::from_static("DENY"));
    h.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    response
}

fn html(status: StatusCode, body: String) -> Response {
    secure(
        (
            status,
            [(header::CONTENT_TYPE, "text/html; charset=utf-8")],
            body,
        )
            .into_response(),
    )
}

fn redirect(to: &str) -> Response {
    secure((StatusCode::SEE_OTHER, [(header::LOCATION, to.to_owned())]).into_response())
}

fn not_found(session: &Session) -> Response {
    html(
        StatusCode::NOT_FOUND,
        pages::error(
            Some(session),
            "Not found",
            "There is no such page, or it belongs to a study you are not assigned to.",
        ),
    )
}

fn forbidden(session: Option<&Session>) -> Response {
    html(
        StatusCode::FORBIDDEN,
        pages::error(
            session,
            "Request refused",
            "The form was missing its security token or it did not match your session. Reload the page and try again.",
        ),
    )
}

/// The session cookie's token, if the request carries one.
fn cookie_token(headers: &HeaderMap) -> Option<String> {
    headers
        .get_all(header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|kv| kv.trim().split_once('='))
        .find(|(k, _)| *k == SESSION_COOKIE)
        .map(|(_, v)| v.to_owned())
        .filter(|v| !v.is_empty() && v.len() <= 128)
}

/// The request's live session, or a redirect to the login page.
async fn require_session(
    state: &Arc<ReviewState>,
    headers: &HeaderMap,
) -> std::result::Result<Session, Response> {
    let Some(token) = cookie_token(headers) else {
        return Err(redirect("/login"));
    };
    match state
        .with_store(move |s| accounts::session(s, &token, now_ms()))
        .await?
    {
        Some(session) => Ok(session),
        None => Err(redirect("/login")),
    }
}

/// The refusal when a form's CSRF token is missing or not the session's.
fn csrf_refusal(session: &Session, token: Option<&str>) -> Option<Response> {
    match token {
        Some(t) if accounts::constant_time_eq(t, &session.csrf_token) => None,
        _ => Some(forbidden(Some(session))),
    }
}

/// The review routes over `state`.
pub fn router(state: Arc<ReviewState>) -> Router {
    Router::new()
        .route("/", get(home))
        .route("/login", get(login_page).post(login))
        .route("/logout", post(logout))
        .route("/study/{study_id}", get(study_overview))
        .route("/study/{study_id}/flags", get(study_queue))
        .route(
            "/study/{study_id}/participant/{label}",
            get(participant_page),
        )
        .route("/flag/{packet_id}", get(flag_detail))
        .route("/flag/{packet_id}/action", post(flag_action))
        .route("/flag/{packet_id}/fhir", get(flag_fhir))
        .fallback(|| async {
            html(
                StatusCode::NOT_FOUND,
                pages::error(None, "Not found", "There is no such page."),
            )
        })
        .with_state(state)
}

async fn home(State(state): State<Arc<ReviewState>>, headers: HeaderMap) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    let ids = session.studies.clone();
    match state.with_store(move |s| db::study_titles(s, &ids)).await {
        Ok(titles) => html(StatusCode::OK, pages::studies(&session, &titles)),
        Err(r) => r,
    }
}

async fn login_page() -> Response {
    html(StatusCode::OK, pages::login(None))
}

#[derive(Debug, Deserialize)]
struct LoginForm {
    #[serde(default)]
    name: String,
    #[serde(default)]
    password: String,
}

/// The peer address of a connection, plain or TLS.
#[derive(Debug, Clone, Copy)]
pub struct ClientAddr(pub SocketAddr);

impl Connected<axum::serve::IncomingStream<'_, TcpListener>> for ClientAddr {
    fn connect_info(stream: axum::serve::IncomingStream<'_, TcpListener>) -> ClientAddr {
        ClientAddr(*stream.remote_addr())
    }
}

impl Connected<axum::serve::IncomingStream<'_, TlsListener>> for ClientAddr {
    fn connect_info(stream: axum::serve::IncomingStream<'_, TlsListener>) -> ClientAddr {
        ClientAddr(*stream.remote_addr())
    }
}

/// How a checked sign-in ended.
enum LoginOutcome {
    Session(String),
    Refused(Option<std::time::Duration>),
}

/// The answer to a sign-in refused for too many failures.
fn too_many_attempts(wait: std::time::Duration) -> Response {
    let seconds = wait.as_secs().max(1);
    let mut r = html(
        StatusCode::TOO_MANY_REQUESTS,
        pages::login(Some(&format!(
            "Too many failed sign-ins for this name or from this address. Try again in {seconds} s."
        ))),
    );
    r.headers_mut().insert(
        header::RETRY_AFTER,
        HeaderValue::from_str(&seconds.to_string()).expect("digits are a valid header"),
    );
    r
}

async fn login(
    State(state): State<Arc<ReviewState>>,
    ConnectInfo(ClientAddr(peer)): ConnectInfo<ClientAddr>,
    Form(form): Form<LoginForm>,
) -> Response {
    let name = form.name.trim().to_owned();
    let source = peer.ip();
    let ticket = match state.limiter.admit(&name, source, Instant::now()) {
        Ok(t) => t,
        Err(wait) => {
            tracing::debug!(name = %limits::counted_name(&name), %source, wait_s = wait.as_secs(), "sign-in refused during a lockout");
            return too_many_attempts(wait);
        }
    };
    let result = state
        .with_store(move |s| {
            let at_ms = now_ms();
            if accounts::verify_login(s, &name, &form.password)? {
                let token = accounts::create_session(s, &name, at_ms)?;
                limits::record(s, at_ms, &name, source, LoginEvent::Success, "")?;
                ticket.succeeded();
                tracing::info!(name = %name, %source, "reviewer signed in");
                return Ok(LoginOutcome::Session(token));
            }
            let counted = ticket.name().to_owned();
            let lockouts = ticket.failed(Instant::now());
            tracing::warn!(name = %counted, %source, "failed sign-in to the review pages");
            limits::record(
                s,
                at_ms,
                &name,
                source,
                LoginEvent::Failure,
                "wrong name or password",
            )?;
            for lockout in &lockouts {
                let detail = limits::lockout_detail(lockout);
                tracing::warn!(name = %counted, %source, "review sign-in lockout: {detail}");
                limits::record(s, at_ms, &name, source, LoginEvent::Lockout, &detail)?;
            }
            Ok(LoginOutcome::Refused(
                lockouts.iter().map(|l| l.delay).max(),
            ))
        })
        .await;
    match result {
        Ok(LoginOutcome::Session(token)) => {
            let mut r = redirect("/");
            let cookie = format!(
                "{SESSION_COOKIE}={token}; {}; Max-Age={}",
                state.cookie_attributes(),
                accounts::SESSION_TTL_MS / 1000
            );
            r.headers_mut().insert(
                header::SET_COOKIE,
                HeaderValue::from_str(&cookie).expect("hex token is a valid header"),
            );
            r
        }
        Ok(LoginOutcome::Refused(Some(wait))) => too_many_attempts(wait),
        Ok(LoginOutcome::Refused(None)) => html(
            StatusCode::UNAUTHORIZED,
            pages::login(Some("That name and password do not match an account.")),
        ),
        Err(r) => r,
    }
}

#[derive(Debug, Deserialize)]
struct CsrfForm {
    csrf: Option<String>,
}

async fn logout(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    Form(form): Form<CsrfForm>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    if let Some(refusal) = csrf_refusal(&session, form.csrf.as_deref()) {
        return refusal;
    }
    let token = cookie_token(&headers).unwrap_or_default();
    if let Err(r) = state
        .with_store(move |s| accounts::end_session(s, &token))
        .await
    {
        return r;
    }
    let mut r = redirect("/login");
    let cleared = format!(
        "{SESSION_COOKIE}=; {}; Max-Age=0",
        state.cookie_attributes()
    );
    r.headers_mut().insert(
        header::SET_COOKIE,
        HeaderValue::from_str(&cleared).expect("ASCII cookie"),
    );
    r
}

async fn study_overview(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath(study_id): UrlPath<String>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    if !session.may_see(&study_id) {
        return not_found(&session);
    }
    match state.with_store(move |s| db::overview(s, &study_id)).await {
        Ok(Some(o)) => html(StatusCode::OK, pages::overview(&session, &o, now_ms())),
        Ok(None) => not_found(&session),
        Err(r) => r,
    }
}

async fn participant_page(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath((study_id, label)): UrlPath<(String, String)>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    if !session.may_see(&study_id) {
        return not_found(&session);
    }
    let found = state
        .with_store(move |s| {
            let Some(config) = s.studies()?.into_iter().find(|c| c.study_id == study_id) else {
                return Ok(None);
            };
            Ok(db::participant(s, &study_id, &label)?
                .map(|(row, episodes)| (config, row, episodes)))
        })
        .await;
    match found {
        Ok(Some((config, row, episodes))) => html(
            StatusCode::OK,
            pages::participant(&session, &config, &row, &episodes),
        ),
        Ok(None) => not_found(&session),
        Err(r) => r,
    }
}

#[derive(Debug, Deserialize)]
struct QueueQuery {
    signal: Option<String>,
    level: Option<String>,
    status: Option<String>,
}

async fn study_queue(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath(study_id): UrlPath<String>,
    Query(q): Query<QueueQuery>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    if !session.may_see(&study_id) {
        return not_found(&session);
    }
    // A filter value the form does not offer is refused, not read as "all".
    let level = q.level.as_deref().filter(|v| !v.is_empty());
    let status = q.status.as_deref().filter(|v| !v.is_empty());
    let bad_filter = |what: &str, value: &str, choices: &str| {
        html(
            StatusCode::BAD_REQUEST,
            pages::error(
                Some(&session),
                "Filter not valid",
                &format!(
                    "There is no {what} `{}`; choose {choices}, or leave it empty for all.",
                    value.chars().take(40).collect::<String>()
                ),
            ),
        )
    };
    if let Some(v) = level
        && FlagLevel::parse(v).is_none()
    {
        return bad_filter("level", v, "alert or watch");
    }
    if let Some(v) = status
        && ReviewStatus::parse(v).is_none()
    {
        return bad_filter("status", v, "new, acknowledged, dismissed or escalated");
    }
    let filter = QueueFilter {
        signal: q.signal.filter(|s| !s.is_empty()),
        level: level.and_then(FlagLevel::parse),
        status: status.and_then(ReviewStatus::parse),
    };
    let id = study_id.clone();
    let f = filter.clone();
    let loaded = state
        .with_store(move |s| {
            let title = db::study_titles(s, std::slice::from_ref(&id))?
                .pop()
                .map(|(_, t)| t);
            Ok((title, db::queue(s, &id, &f)?, db::flagged_signals(s, &id)?))
        })
        .await;
    match loaded {
        Ok((Some(_), _, signals))
            if filter.signal.as_ref().is_some_and(|s| !signals.contains(s)) =>
        {
            let choices = if signals.is_empty() {
                "none (this study has no flags yet)".to_owned()
            } else {
                signals.join(", ")
            };
            html(
                StatusCode::BAD_REQUEST,
                pages::error(
                    Some(&session),
                    "Filter not valid",
                    &format!(
                        "No episode in this study involves signal `{}`; signals with episodes: {choices}.",
                        filter
                            .signal
                            .as_deref()
                            .unwrap_or_default()
                            .chars()
                            .take(40)
                            .collect::<String>()
                    ),
                ),
            )
        }
        Ok((Some(title), entries, signals)) => html(
            StatusCode::OK,
            pages::queue(&session, &study_id, &title, &entries, &filter, &signals),
        ),
        Ok((None, _, _)) => not_found(&session),
        Err(r) => r,
    }
}

#[derive(Debug, Deserialize)]
struct FlagQuery {
    done: Option<String>,
}

async fn flag_detail(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath(packet_id): UrlPath<u64>,
    Query(q): Query<FlagQuery>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    let message = q
        .done
        .as_deref()
        .and_then(ReviewAction::parse)
        .map(|a| match a {
            ReviewAction::Acknowledge => "Recorded: acknowledged.",
            ReviewAction::Dismiss => "Recorded: dismissed.",
            ReviewAction::Escalate => "Recorded: escalated.",
        });
    render_flag(
        &state,
        &session,
        packet_id,
        message.map(|m| (m, true)),
        StatusCode::OK,
    )
    .await
}

/// The episode as a FHIR R4 Bundle (JSON download; see [`crate::fhir`]).
async fn flag_fhir(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath(packet_id): UrlPath<u64>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    match state.with_store(move |s| db::flag(s, packet_id)).await {
        Ok(Some(record)) if session.may_see(&record.study_id) => {
            let body = serde_json::to_string_pretty(&crate::fhir::episode_bundle(&record))
                .expect("a JSON value serialises");
            let mut r = (StatusCode::OK, body).into_response();
            let h = r.headers_mut();
            h.insert(
                header::CONTENT_TYPE,
                HeaderValue::from_static("application/fhir+json; fhirVersion=4.0"),
            );
            h.insert(
                header::CONTENT_DISPOSITION,
                HeaderValue::from_str(&format!(
                    "attachment; filename=\"episode-{packet_id}.fhir.json\""
                ))
                .expect("ASCII header"),
            );
            secure(r)
        }
        Ok(_) => not_found(&session),
        Err(r) => r,
    }
}

async fn render_flag(
    state: &Arc<ReviewState>,
    session: &Session,
    packet_id: u64,
    message: Option<(&str, bool)>,
    status: StatusCode,
) -> Response {
    let loaded = state
        .with_store(move |s| {
            let Some(record) = db::flag(s, packet_id)? else {
                return Ok(None);
            };
            let related = db::related_flags(s, &record)?;
            let title = db::study_titles(s, std::slice::from_ref(&record.study_id))?
                .pop()
                .map_or_else(|| record.study_id.clone(), |(_, t)| t);
            Ok(Some((record, related, title)))
        })
        .await;
    match loaded {
        Ok(Some((record, related, title))) if session.may_see(&record.study_id) => html(
            status,
            pages::flag(session, &title, &record, &related, message),
        ),
        Ok(_) => not_found(session),
        Err(r) => r,
    }
}

#[derive(Debug, Deserialize)]
struct ActionForm {
    csrf: Option<String>,
    action: Option<String>,
    #[serde(default)]
    note: String,
}

async fn flag_action(
    State(state): State<Arc<ReviewState>>,
    headers: HeaderMap,
    UrlPath(packet_id): UrlPath<u64>,
    Form(form): Form<ActionForm>,
) -> Response {
    let session = match require_session(&state, &headers).await {
        Ok(s) => s,
        Err(r) => return r,
    };
    if let Some(refusal) = csrf_refusal(&session, form.csrf.as_deref()) {
        return refusal;
    }
    let Some(action) = form.action.as_deref().and_then(ReviewAction::parse) else {
        return render_flag(
            &state,
            &session,
            packet_id,
            Some(("Choose acknowledge, dismiss or escalate.", false)),
            StatusCode::BAD_REQUEST,
        )
        .await;
    };
    let reviewer = session.reviewer.clone();
    let studies = session.studies.clone();
    let outcome = state
        .with_store(move |s| {
            let Some(record) = db::flag(s, packet_id)? else {
                return Ok(None);
            };
            if !studies.contains(&record.study_id) {
                return Ok(None);
            }
            match db::record_action(s, packet_id, &reviewer, action, &form.note, now_ms()) {
                Ok(()) => Ok(Some(Ok(()))),
                Err(AggregatorError::InvalidArgument { reason, .. }) => Ok(Some(Err(reason))),
                Err(e) => Err(e),
            }
        })
        .await;
    match outcome {
        Ok(Some(Ok(()))) => redirect(&format!(
            "/flag/{packet_id}?done={}#history",
            action.as_str()
        )),
        Ok(Some(Err(reason))) => {
            let text = format!("Not recorded: {reason}.");
            render_flag(
                &state,
                &session,
                packet_id,
                Some((&text, false)),
                StatusCode::BAD_REQUEST,
            )
            .await
        }
        Ok(None) => not_found(&session),
        Err(r) => r,
    }
}

/// A running review server: its bound address and a handle to stop it.
#[derive(Debug)]
pub struct RunningReview {
    pub addr: SocketAddr,
    /// Whether the pages are served over TLS.
    pub tls: bool,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<std::io::Result<()>>,
}

impl RunningReview {
    /// The page a browser should open first.
    pub fn url(&self) -> String {
        let scheme = if self.tls { "https" } else { "http" };
        format!("{scheme}://{}/", self.addr)
    }

    /// Stops accepting requests, finishes the ones in flight and waits.
    pub async fn shutdown(mut self) -> anyhow::Result<()> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.task.await??;
        Ok(())
    }
}

/// Serves the review pages on `listener` in plaintext (for loopback; see
/// [`serve_review_with`]), reading the aggregator database at `db_path`
/// through its own connection (migrating it to the current schema if
/// needed).
pub async fn serve_review(db_path: &Path, listener: TcpListener) -> anyhow::Result<RunningReview> {
    serve_review_with(db_path, listener, None).await
}

/// [`serve_review`], over TLS when `tls` is given; session cookies are then
/// marked `Secure`.
pub async fn serve_review_with(
    db_path: &Path,
    listener: TcpListener,
    tls: Option<&TlsIdentity>,
) -> anyhow::Result<RunningReview> {
    serve_review_limited(db_path, listener, tls, LoginLimits::default()).await
}

/// [`serve_review_with`], limiting failed sign-ins by `limits` (tests use
/// short lockouts).
pub async fn serve_review_limited(
    db_path: &Path,
    listener: TcpListener,
    tls: Option<&TlsIdentity>,
    limits: LoginLimits,
) -> anyhow::Result<RunningReview> {
    let store = Store::open(db_path)?;
    let state = Arc::new(
        ReviewState::new(store)
            .with_secure_cookies(tls.is_some())
            .with_login_limits(limits),
    );
    let addr = listener.local_addr()?;
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let app = router(state).into_make_service_with_connect_info::<ClientAddr>();
    let shutdown = async {
        let _ = rx.await;
    };
    let task = match tls {
        None => tokio::spawn(async move {
            axum::serve(listener, app)
                .with_graceful_shutdown(shutdown)
                .await
        }),
        Some(tls) => {
            let listener = TlsListener::new(listener, tls.http_acceptor()?)?;
            tokio::spawn(async move {
                axum::serve(listener, app)
                    .with_graceful_shutdown(shutdown)
                    .await
            })
        }
    };
    tracing::info!(%addr, tls = tls.is_some(), "review pages listening");
    Ok(RunningReview {
        addr,
        tls: tls.is_some(),
        shutdown: Some(tx),
        task,
    })
}

/// Makes sure the demo reviewer exists and is assigned to `study_id`, with a
/// fresh random password (any earlier one stops working and its sessions
/// end). Returns (name, password) for the caller to print once.
pub fn ensure_demo_reviewer(db_path: &Path, study_id: &str) -> Result<(String, String)> {
    let mut store = Store::open(db_path)?;
    let password = accounts::generate_password();
    if accounts::reviewer_exists(&store, DEMO_REVIEWER)? {
        accounts::set_password(&mut store, DEMO_REVIEWER, &password)?;
    } else {
        accounts::add_reviewer(&mut store, DEMO_REVIEWER, &password, now_ms())?;
    }
    accounts::assign(&mut store, DEMO_REVIEWER, study_id)?;
    Ok((DEMO_REVIEWER.to_owned(), password))
}
