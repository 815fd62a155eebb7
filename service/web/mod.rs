//! The web part: status page, JSON API, `/metrics`, health checks and
//! one-click unsubscribe, served by axum on the daemon's runtime when
//! `[web] listen` is set (docs/web.md lists every route).
//!
//! Role: a thin shell. Handlers check access ([`access`]), read through a
//! read-only SQLite connection on a blocking thread ([`read`], [`build`]),
//! hand plain data to pure renderers ([`pages`], [`chart`], [`map`],
//! [`metrics`]) and answer. The only write is the unsubscribe, which goes
//! through the store thread like every other write ([`Store::with`]).
//! Nothing calls into this module but `app.rs`.
//!
//! # Layout
//! - [`access`]: who may see the coordinator's pages (pure).
//! - [`one_click`]: the RFC 8058 POST body, urlencoded or multipart (pure).
//! - [`assess`]: last-24-hour levels and the 14 nights, from the engine's
//!   own baseline functions (pure).
//! - [`chart`]: the 14-night chart as SVG (pure, reusable: the digest).
//! - [`map`]: the site map as SVG (pure).
//! - [`view`]: what each page shows, shared by HTML and JSON (pure).
//! - [`pages`]: HTML documents (pure).
//! - [`metrics`]: Prometheus text exposition (pure).
//! - [`read`], [`build`]: the reads behind each page (I/O, blocking).

// Handlers return a finished refusal as `Err(Response)`; it is made once
// per request, so boxing it would buy nothing.
#![allow(clippy::result_large_err)]

pub mod access;
pub mod assess;
pub mod build;
pub mod chart;
pub mod map;
pub mod metrics;
pub mod one_click;
pub mod pages;
pub mod read;
pub mod view;

use crate::clock::Clock;
use crate::config::Config;
use crate::engine::rules::RuleBook;
use crate::notify::token::{sign_token, verify_token, Purpose, TokenError, TokenKey};
use crate::store::{Store, StoreError};
use crate::telemetry::Counters;
use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, Path, RawQuery, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;
use chrono::Duration;
use read::Reader;
use std::sync::Arc;
use tokio_util::sync::CancellationToken;

/// Largest request body read (an unsubscribe POST is a few dozen bytes).
const MAX_BODY: usize = 16 * 1024;
/// Lifetime of the unsubscribe link behind a subscriber page's button.
const BUTTON_LINK_HOURS: i64 = 24;

/// What the handlers share.
pub struct Web {
    cfg: Arc<Config>,
    rules: RuleBook,
    store: Store,
    counters: Arc<Counters>,
    clock: Arc<dyn Clock>,
    key: TokenKey,
    /// The listen address is loopback (see [`access`]).
    loopback: bool,
}

impl Web {
    pub fn new(
        cfg: Arc<Config>,
        store: Store,
        counters: Arc<Counters>,
        clock: Arc<dyn Clock>,
        key: TokenKey,
        loopback: bool,
    ) -> Self {
        Web {
            rules: RuleBook::compile(&cfg),
            cfg,
            store,
            counters,
            clock,
            key,
            loopback,
        }
    }
}

type Shared = Arc<Web>;

/// The routes (also used by tests, with a listener of their own).
pub fn router(web: Web) -> Router {
    Router::new()
        .route("/", get(overview))
        .route("/api/overview", get(api_overview))
        .route("/sites/{id}", get(site))
        .route("/api/sites/{id}", get(api_site))
        .route("/notices", get(notices))
        .route("/api/notices", get(api_notices))
        .route("/rejected", get(rejected))
        .route("/api/rejected", get(api_rejected))
        .route("/subscribers", get(subscribers))
        .route("/api/subscribers", get(api_subscribers))
        .route("/subscribers/{id}", get(subscriber))
        .route("/api/subscribers/{id}", get(api_subscriber))
        .route("/my/{token}", get(own_page))
        .route("/api/my/{token}", get(api_own_page))
        .route(
            "/unsubscribe/{token}",
            get(unsubscribe_question).post(unsubscribe),
        )
        .route("/api/report.csv", get(api_report_csv))
        .route("/metrics", get(metrics_text))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .fallback(not_found)
        .layer(DefaultBodyLimit::max(MAX_BODY))
        .with_state(Arc::new(web))
}

/// Serves until `stop` is cancelled, then lets requests in progress finish.
pub async fn serve(listener: tokio::net::TcpListener, web: Web, stop: CancellationToken) {
    let app = router(web);
    if let Err(error) = axum::serve(listener, app)
        .with_graceful_shutdown(stop.cancelled_owned())
        .await
    {
        tracing::error!(%error, "Status page server stopped");
    }
}

// ------------------------------------------------------------ responses

/// Headers every page carries: nothing loads from elsewhere (CSP), no
/// content sniffing, no referrer (links carry tokens), no caching of
/// signed pages.
fn secure(mut r: Response) -> Response {
    let h = r.headers_mut();
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static("default-src 'none'; style-src 'unsafe-inline'; img-src 'self' data:; form-action 'self'; frame-ancestors 'none'; base-uri 'none'"),
    );
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    r
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

fn json<T: serde::Serialize>(status: StatusCode, v: &T) -> Response {
    match serde_json::to_string_pretty(v) {
        Ok(body) => {
            secure((status, [(header::CONTENT_TYPE, "application/json")], body).into_response())
        }
        Err(e) => error(
            true,
            StatusCode::INTERNAL_SERVER_ERROR,
            "Cannot encode",
            &e.to_string(),
        ),
    }
}

fn text(status: StatusCode, body: String) -> Response {
    secure(
        (
            status,
            [(header::CONTENT_TYPE, "text/plain; charset=utf-8")],
            body,
        )
            .into_response(),
    )
}

fn error(api: bool, status: StatusCode, title: &str, message: &str) -> Response {
    if api {
        json(status, &serde_json::json!({ "error": message }))
    } else {
        html(status, pages::message(title, message))
    }
}

/// The coordinator's access check; `Err` is the refusal to send.
fn coordinator(w: &Web, headers: &HeaderMap, api: bool) -> Result<(), Response> {
    let auth = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok());
    let a = access::check(w.loopback, w.cfg.web.admin_token.as_ref(), auth);
    if a == access::Access::Allowed {
        return Ok(());
    }
    let status = StatusCode::from_u16(a.status()).unwrap_or(StatusCode::FORBIDDEN);
    let mut r = error(api, status, "Not available", a.message());
    if status == StatusCode::UNAUTHORIZED {
        r.headers_mut().insert(
            header::WWW_AUTHENTICATE,
            HeaderValue::from_static("Bearer realm=\"outrider\""),
        );
    }
    Err(r)
}

/// Runs `f` with a read-only connection on a blocking thread.
async fn with_reader<T: Send + 'static>(
    w: &Shared,
    f: impl FnOnce(&Web, &mut Reader) -> Result<T, StoreError> + Send + 'static,
) -> Result<T, String> {
    let w = w.clone();
    let joined = tokio::task::spawn_blocking(move || {
        let mut r = Reader::open(&w.cfg.service.state_dir)?;
        f(&w, &mut r)
    })
    .await;
    match joined {
        Ok(Ok(v)) => Ok(v),
        Ok(Err(e)) => {
            tracing::warn!(error = %e, "Status page could not read the store");
            Err(format!("the store could not be read: {e}"))
        }
        Err(e) => Err(format!("the page could not be built: {e}")),
    }
}

fn unavailable(api: bool, message: &str) -> Response {
    error(
        api,
        StatusCode::SERVICE_UNAVAILABLE,
        "Store not readable",
        message,
    )
}

fn missing(api: bool, what: &str) -> Response {
    error(api, StatusCode::NOT_FOUND, "Not found", what)
}

// ------------------------------------------------------------ handlers

async fn overview_data(
    w: &Shared,
    headers: &HeaderMap,
    api: bool,
) -> Result<view::Overview, Response> {
    coordinator(w, headers, api)?;
    let now = w.clock.now();
    let broker = w
        .counters
        .broker_connected
        .load(std::sync::atomic::Ordering::Relaxed);
    let writable = w.counters.store_writable();
    with_reader(w, move |w, r| {
        build::overview(&w.cfg, r, now, broker, writable)
    })
    .await
    .map_err(|e| unavailable(api, &e))
}

async fn overview(State(w): State<Shared>, headers: HeaderMap) -> Response {
    match overview_data(&w, &headers, false).await {
        Ok(v) => html(StatusCode::OK, pages::overview(&v)),
        Err(r) => r,
    }
}

async fn api_overview(State(w): State<Shared>, headers: HeaderMap) -> Response {
    match overview_data(&w, &headers, true).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

async fn site_data(
    w: &Shared,
    headers: &HeaderMap,
    id: String,
    api: bool,
) -> Result<view::SitePage, Response> {
    coordinator(w, headers, api)?;
    let now = w.clock.now();
    let shown = crate::notify::header_safe(&id);
    match with_reader(w, move |w, r| build::site(&w.cfg, r, &id, now)).await {
        Ok(Some(v)) => Ok(v),
        Ok(None) => Err(missing(
            api,
            &format!("No site `{shown}` in the sites file."),
        )),
        Err(e) => Err(unavailable(api, &e)),
    }
}

async fn site(State(w): State<Shared>, headers: HeaderMap, Path(id): Path<String>) -> Response {
    match site_data(&w, &headers, id, false).await {
        Ok(v) => html(StatusCode::OK, pages::site(&v)),
        Err(r) => r,
    }
}

async fn api_site(State(w): State<Shared>, headers: HeaderMap, Path(id): Path<String>) -> Response {
    match site_data(&w, &headers, id, true).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

async fn notices_data(
    w: &Shared,
    headers: &HeaderMap,
    query: Option<String>,
    api: bool,
) -> Result<view::NoticesPage, Response> {
    coordinator(w, headers, api)?;
    let filter: view::NoticeFilter = serde_urlencoded::from_str(query.as_deref().unwrap_or(""))
        .map_err(|e| {
            error(
                api,
                StatusCode::BAD_REQUEST,
                "Bad filter",
                &format!("the query is not understood ({e}); use subscriber, species, trigger, disposition, deploymentID, limit"),
            )
        })?;
    let filter = filter.normalised();
    let now = w.clock.now();
    with_reader(w, move |w, r| build::notices(&w.cfg, r, filter, now))
        .await
        .map_err(|e| unavailable(api, &e))
}

async fn notices(State(w): State<Shared>, headers: HeaderMap, RawQuery(q): RawQuery) -> Response {
    match notices_data(&w, &headers, q, false).await {
        Ok(v) => html(StatusCode::OK, pages::notices(&v)),
        Err(r) => r,
    }
}

async fn api_notices(
    State(w): State<Shared>,
    headers: HeaderMap,
    RawQuery(q): RawQuery,
) -> Response {
    match notices_data(&w, &headers, q, true).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

#[derive(serde::Deserialize, Default)]
#[serde(default, deny_unknown_fields)]
struct RejectedQuery {
    reason: Option<String>,
}

async fn rejected_data(
    w: &Shared,
    headers: &HeaderMap,
    query: Option<String>,
    api: bool,
) -> Result<view::RejectedPage, Response> {
    coordinator(w, headers, api)?;
    let q: RejectedQuery =
        serde_urlencoded::from_str(query.as_deref().unwrap_or("")).map_err(|e| {
            error(
                api,
                StatusCode::BAD_REQUEST,
                "Bad filter",
                &format!("the query is not understood ({e}); use reason"),
            )
        })?;
    let reason = q.reason.filter(|r| !r.is_empty());
    with_reader(w, move |_, r| build::rejected(r, reason))
        .await
        .map_err(|e| unavailable(api, &e))
}

async fn rejected(State(w): State<Shared>, headers: HeaderMap, RawQuery(q): RawQuery) -> Response {
    match rejected_data(&w, &headers, q, false).await {
        Ok(v) => html(StatusCode::OK, pages::rejected(&v)),
        Err(r) => r,
    }
}

async fn api_rejected(
    State(w): State<Shared>,
    headers: HeaderMap,
    RawQuery(q): RawQuery,
) -> Response {
    match rejected_data(&w, &headers, q, true).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

/// Query of `/api/report.csv`: `by=day|week|month` (default day), and
/// optional RFC 3339 `from` and `to`.
#[derive(Debug, serde::Deserialize)]
struct ReportQuery {
    by: Option<String>,
    from: Option<String>,
    to: Option<String>,
}

/// Counts, camera-nights and RAI per site, species and period as CSV (the
/// rows of `outrider report`).
async fn api_report_csv(
    State(w): State<Shared>,
    headers: HeaderMap,
    RawQuery(q): RawQuery,
) -> Response {
    use crate::interchange::report::{Period, ReportSpec};
    if let Err(r) = coordinator(&w, &headers, true) {
        return r;
    }
    let bad = |m: String| error(true, StatusCode::BAD_REQUEST, "Bad request", &m);
    let q: ReportQuery = match serde_urlencoded::from_str(q.as_deref().unwrap_or("")) {
        Ok(q) => q,
        Err(e) => return bad(format!("bad query: {e}")),
    };
    let by = match q.by.as_deref().unwrap_or("day") {
        "day" => Period::Day,
        "week" => Period::Week,
        "month" => Period::Month,
        other => return bad(format!("by={other:?}: use day, week or month")),
    };
    let (from, to) = match crate::report::window(q.from.as_deref(), q.to.as_deref()) {
        Ok(w) => w,
        Err(e) => return bad(format!("{e:#}")),
    };
    let spec = ReportSpec { by, from, to };
    let now = w.clock.now();
    let w2 = w.clone();
    let made = tokio::task::spawn_blocking(move || {
        let history = crate::report::read_history(&w2.cfg)?;
        Ok::<_, anyhow::Error>(crate::interchange::report_csv(
            &w2.cfg, &history, &spec, now,
        )?)
    })
    .await;
    match made {
        Ok(Ok(csv)) => secure(
            (
                StatusCode::OK,
                [(header::CONTENT_TYPE, "text/csv; charset=utf-8")],
                csv,
            )
                .into_response(),
        ),
        Ok(Err(e)) => unavailable(true, &format!("{e:#}")),
        Err(e) => unavailable(true, &e.to_string()),
    }
}

async fn subscribers(State(w): State<Shared>, headers: HeaderMap) -> Response {
    if let Err(r) = coordinator(&w, &headers, false) {
        return r;
    }
    match with_reader(&w, |w, r| build::subscribers(&w.cfg, &w.rules, r)).await {
        Ok(v) => html(StatusCode::OK, pages::subscribers(&v)),
        Err(e) => unavailable(false, &e),
    }
}

async fn api_subscribers(State(w): State<Shared>, headers: HeaderMap) -> Response {
    if let Err(r) = coordinator(&w, &headers, true) {
        return r;
    }
    match with_reader(&w, |w, r| build::subscribers(&w.cfg, &w.rules, r)).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(e) => unavailable(true, &e),
    }
}

async fn subscriber_data(
    w: &Shared,
    id: String,
    own: bool,
    api: bool,
) -> Result<view::SubscriberPage, Response> {
    let now = w.clock.now();
    let shown = crate::notify::header_safe(&id);
    match with_reader(w, move |w, r| {
        build::subscriber(&w.cfg, &w.rules, r, &id, own, now)
    })
    .await
    {
        Ok(Some(v)) => Ok(v),
        Ok(None) => Err(missing(
            api,
            &format!("No subscriber `{shown}` in the configuration."),
        )),
        Err(e) => Err(unavailable(api, &e)),
    }
}

async fn subscriber(
    State(w): State<Shared>,
    headers: HeaderMap,
    Path(id): Path<String>,
) -> Response {
    if let Err(r) = coordinator(&w, &headers, false) {
        return r;
    }
    match subscriber_data(&w, id, false, false).await {
        Ok(v) => html(
            StatusCode::OK,
            pages::subscriber(&v, &pages::Viewer::Coordinator),
        ),
        Err(r) => r,
    }
}

async fn api_subscriber(
    State(w): State<Shared>,
    headers: HeaderMap,
    Path(id): Path<String>,
) -> Response {
    if let Err(r) = coordinator(&w, &headers, true) {
        return r;
    }
    match subscriber_data(&w, id, false, true).await {
        Ok(v) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

/// Checks a link token; `Err` is the refusal page.
fn link(w: &Web, token: &str, purpose: Purpose, api: bool) -> Result<String, Response> {
    match verify_token(&w.key, token, purpose, w.clock.now()) {
        Ok(c) => Ok(c.subscriber_id),
        Err(TokenError::Expired(_)) => Err(error(
            api,
            StatusCode::FORBIDDEN,
            "Link expired",
            "This link has expired. A newer notice carries a fresh one, or ask your pest coordinator.",
        )),
        Err(_) => Err(error(
            api,
            StatusCode::FORBIDDEN,
            "Link not valid",
            "This link is not valid: it may have been cut short or changed. Use the link in a notice as it came, or ask your pest coordinator.",
        )),
    }
}

async fn own_data(
    w: &Shared,
    token: &str,
    api: bool,
) -> Result<(view::SubscriberPage, String), Response> {
    let id = link(w, token, Purpose::Page, api)?;
    let page = subscriber_data(w, id.clone(), true, api).await?;
    let t = sign_token(
        &w.key,
        Purpose::Unsubscribe,
        &id,
        w.clock.now() + Duration::hours(BUTTON_LINK_HOURS),
    );
    Ok((page, format!("/unsubscribe/{t}")))
}

async fn own_page(State(w): State<Shared>, Path(token): Path<String>) -> Response {
    match own_data(&w, &token, false).await {
        Ok((v, unsubscribe)) => html(
            StatusCode::OK,
            pages::subscriber(&v, &pages::Viewer::Subscriber { unsubscribe }),
        ),
        Err(r) => r,
    }
}

async fn api_own_page(State(w): State<Shared>, Path(token): Path<String>) -> Response {
    match own_data(&w, &token, true).await {
        Ok((v, _)) => json(StatusCode::OK, &v),
        Err(r) => r,
    }
}

fn subscriber_name(w: &Web, id: &str) -> Option<String> {
    w.cfg
        .subscribers
        .iter()
        .find(|s| s.id == id)
        .map(|s| s.name.clone())
}

/// GET of an unsubscribe link: asks, changes nothing (RFC 8058 §3.2).
async fn unsubscribe_question(State(w): State<Shared>, Path(token): Path<String>) -> Response {
    let id = match link(&w, &token, Purpose::Unsubscribe, false) {
        Ok(id) => id,
        Err(r) => return r,
    };
    let Some(name) = subscriber_name(&w, &id) else {
        return missing(false, "This subscriber is no longer in the configuration.");
    };
    let key = id.clone();
    match with_reader(&w, move |_, r| Ok(r.unsubscribes()?.remove(&key))).await {
        Ok(since) => html(
            StatusCode::OK,
            pages::unsubscribe_confirm(
                &name,
                &format!("/unsubscribe/{}", pages::url_part(&token)),
                since,
            ),
        ),
        Err(e) => unavailable(false, &e),
    }
}

/// POST of an unsubscribe link: the one-click unsubscribe (RFC 8058). The
/// answer is the result itself: no redirect, no cookie.
async fn unsubscribe(
    State(w): State<Shared>,
    Path(token): Path<String>,
    headers: HeaderMap,
    body: Bytes,
) -> Response {
    let id = match link(&w, &token, Purpose::Unsubscribe, false) {
        Ok(id) => id,
        Err(r) => return r,
    };
    let Some(name) = subscriber_name(&w, &id) else {
        return missing(false, "This subscriber is no longer in the configuration.");
    };
    let ct = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok());
    let request = match one_click::parse(ct, &body) {
        Ok(r) => r,
        Err(e) => {
            return error(
                false,
                StatusCode::BAD_REQUEST,
                "Not unsubscribed",
                &format!("Nothing was changed: {e}."),
            )
        }
    };
    let via = if request.from_page {
        "page"
    } else {
        "one-click"
    };
    let now = w.clock.now();
    let key = id.clone();
    match w.store.with(move |b| b.unsubscribe(&key, now, via)).await {
        Ok(Ok(u)) => {
            tracing::info!(subscriber = %id, via, closed = u.closed, new = u.new, "Unsubscribed from email");
            html(StatusCode::OK, pages::unsubscribe_done(&name, u.closed))
        }
        Ok(Err(e)) => {
            tracing::error!(subscriber = %id, error = %e, "Could not record an unsubscribe");
            error(false, StatusCode::SERVICE_UNAVAILABLE, "Not unsubscribed", "Nothing was changed: the store cannot take the change now. Please try the link again later.")
        }
        Err(_) => error(
            false,
            StatusCode::SERVICE_UNAVAILABLE,
            "Not unsubscribed",
            "Nothing was changed: the service is stopping. Please try the link again later.",
        ),
    }
}

async fn metrics_text(State(w): State<Shared>, headers: HeaderMap) -> Response {
    if let Err(r) = coordinator(&w, &headers, true) {
        return r;
    }
    let now = w.clock.now();
    let facts = with_reader(&w, move |w, r| build::store_facts(&w.cfg, r, now))
        .await
        .unwrap_or_default();
    let body = metrics::render(&w.counters.snapshot(), &facts);
    let mut r = text(StatusCode::OK, body);
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static(metrics::CONTENT_TYPE),
    );
    r
}

/// Alive: the process answers.
async fn healthz() -> Response {
    text(StatusCode::OK, "ok\n".into())
}

/// Ready: the store takes writes and the broker is connected.
async fn readyz(State(w): State<Shared>) -> Response {
    let broker = w
        .counters
        .broker_connected
        .load(std::sync::atomic::Ordering::Relaxed);
    let store = w.counters.store_writable();
    if broker && store {
        return text(StatusCode::OK, "ready\n".into());
    }
    let mut why = Vec::new();
    if !broker {
        why.push("the MQTT broker is not connected");
    }
    if !store {
        why.push("the store cannot take writes");
    }
    text(
        StatusCode::SERVICE_UNAVAILABLE,
        format!("not ready: {}\n", why.join("; ")),
    )
}

async fn not_found() -> Response {
    error(
        false,
        StatusCode::NOT_FOUND,
        "Not found",
        "There is no page at this address.",
    )
}
