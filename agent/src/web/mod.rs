//! The responder view: a read-only HTTP server inside the daemon.
//!
//! Routes (GET and HEAD only; every other method gets 405 with an `Allow`
//! header, on every path, so nothing can be changed over HTTP; and only for
//! a `Host` the page answers to, see below):
//!
//! * `/`: the page for people, every open event ([`page`]).
//! * `/api/status`: the `leaktally status --json` document, open events.
//! * `/api/events`: the event history (`crate::status::history`), open and
//!   closed, newest first; `?tank=`, `?state=open|closed`, `?limit=`.
//! * `/api/events/{id}`: the same document for one event, open or closed.
//! * `/api/events/{id}/series`: the cumulative release for the chart,
//!   thinned to at most [`chart::MAX_POINTS`] points ([`chart`]).
//! * `/metrics`: Prometheus text format ([`metrics`]).
//! * `/assets/...`: the page's style sheet, refresh script and icon.
//!
//! Threads: handlers never touch the daemon's writer connection. Each
//! request opens one short-lived read-only connection on the blocking pool
//! (`spawn_blocking`), which WAL lets run beside the writer, and reads
//! everything it shows through it (the status document from
//! `crate::status`, the chart's series, the notes); a semaphore
//! bounds how many run at once. Connections are accepted by [`server`],
//! with a bound on how many are open and timeouts for slow and silent
//! peers, so that no neighbour can take the descriptors the pollers need.
//!
//! The `Host` check: a request is answered only if its `Host` names the
//! page (the listen address or the address the connection came in on, with
//! the listen port; `localhost` on loopback; a name in `[web] hosts`).
//! Anything else gets 421. A web page elsewhere can point a name of its own
//! at this machine (DNS rebinding) and then make a browser here send it
//! requests that the browser thinks are same-origin; the `Host` header
//! still carries that foreign name, so the JSON is never read that way.
//!
//! Left out: authentication and TLS. The page only reads, and it listens on
//! loopback unless the config opts in to a reachable address
//! (`allow_remote`); put a reverse proxy in front to publish it further.

pub mod chart;
pub mod html;
pub mod metrics;
pub mod page;
pub mod server;

use crate::acquire::stats::Stats;
use crate::config::{Config, HostName, Web};
use crate::loss::Board;
use crate::report::Presentation;
use crate::status::{self, EventFilter, StatusError};
use crate::store::health::StoreHealth;
use crate::store::outbox::OutboxState;
use crate::store::{self, StoreError};
use axum::Router;
use axum::body::Body;
use axum::extract::{Path as UrlPath, Request, State};
use axum::http::{HeaderValue, Method, StatusCode, Uri, header};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use serde::Serialize;
use std::collections::HashSet;
use std::net::{IpAddr, SocketAddr};
use std::path::PathBuf;
use std::sync::{Arc, Mutex, OnceLock, PoisonError};
use std::time::Duration;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tokio_util::sync::CancellationToken;
use tracing::{info, warn};

/// Database reads that may run at once. Each holds a blocking-pool thread
/// and a SQLite connection for a few milliseconds; four keep a page, a
/// scrape and a couple of API clients moving on a 2-core box, and a flood
/// of requests queues here instead of filling the blocking pool.
const CONCURRENT_READS: usize = 4;
/// How long a request waits for a read slot before it gets 503.
const READ_QUEUE: Duration = Duration::from_secs(5);
/// Distinct foreign `Host` names logged; past this they are only counted,
/// so a page that tries many names cannot fill the log.
const HOSTS_LOGGED: usize = 16;

/// The methods the server answers.
const ALLOW: &str = "GET, HEAD";

/// Content type of the Prometheus text exposition format.
pub const METRICS_CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// The page's content security policy: no inline script or style, nothing
/// from elsewhere, no frames, no forms. Text is escaped anyway; this is the
/// second line.
pub(crate) const PAGE_POLICY: &str = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; \
connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

const STYLE: &str = include_str!("assets/leaktally.css");
const SCRIPT: &str = include_str!("assets/refresh.js");
const ICON: &str = include_str!("assets/icon.svg");

/// What every handler shares.
pub struct Shared {
    pub db: PathBuf,
    pub config: Arc<Config>,
    pub stats: Arc<Stats>,
    /// Whether the database takes the daemon's writes.
    pub health: Arc<StoreHealth>,
    /// The suspected losses standing, from the daemon's tracker.
    pub losses: Arc<Board>,
    /// The MQTT outbox, from the daemon's tracker and publisher.
    pub outbox: Arc<OutboxState>,
    /// When the daemon started, UTC ms (for the metrics).
    pub started_ms: i64,
    /// Bounds the database reads in flight; see [`CONCURRENT_READS`].
    readers: Semaphore,
    /// The address the server is bound to (its port, when the config says
    /// 0), once serving; the config's listen address until then.
    bound: OnceLock<SocketAddr>,
    /// Foreign `Host` names already logged.
    refused_hosts: Mutex<HashSet<String>>,
}

impl Shared {
    pub fn new(
        db: PathBuf,
        config: Arc<Config>,
        stats: Arc<Stats>,
        health: Arc<StoreHealth>,
        started_ms: i64,
    ) -> Self {
        Self {
            db,
            config,
            stats,
            health,
            losses: Arc::new(Board::default()),
            outbox: Arc::new(OutboxState::default()),
            started_ms,
            readers: Semaphore::new(CONCURRENT_READS),
            bound: OnceLock::new(),
            refused_hosts: Mutex::new(HashSet::new()),
        }
    }

    /// The same, showing the suspected losses of this board (the
    /// daemon's tracker's).
    pub fn with_losses(mut self, losses: Arc<Board>) -> Self {
        self.losses = losses;
        self
    }

    /// The same, showing this MQTT outbox (the daemon's).
    pub fn with_outbox(mut self, outbox: Arc<OutboxState>) -> Self {
        self.outbox = outbox;
        self
    }

    /// The address the page is served on: where it is bound, else the
    /// configured one (for a router used without a server, as in tests).
    fn listen(&self) -> SocketAddr {
        self.bound.get().copied().unwrap_or_else(|| {
            self.config.web.as_ref().map_or_else(
                || {
                    crate::config::DEFAULT_WEB_LISTEN
                        .parse()
                        .expect("a valid default")
                },
                |w| w.listen,
            )
        })
    }
}

/// Binds the configured address; the daemon calls this before anything
/// else, so a port in use stops it at startup with a clear error. It also
/// raises the open-file limit ([`server::raise_open_file_limit`]), before
/// any poller or database file is opened.
pub async fn bind(web: &Web, config_path: &std::path::Path) -> anyhow::Result<TcpListener> {
    // Raised before any poller or database file is opened; `serve` says
    // the limit with the connection limit it leads to.
    server::raise_open_file_limit();
    let listener = listen(web.listen).map_err(|e| {
        anyhow::anyhow!(
            "cannot serve the web page on {}: {e}; choose another [web] listen address in {} \
             (or stop whatever uses that port), or remove the [web] section",
            web.listen,
            config_path.display()
        )
    })?;
    let bound = listener.local_addr()?;
    if web.is_remote() {
        warn!(
            "the web page listens on {bound}, which other machines can reach (allow_remote = true); \
             it is read-only but has no login, so keep it on a trusted network"
        );
    }
    info!("web page on http://{bound}/ (JSON at /api/status, metrics at /metrics)");
    Ok(listener)
}

/// A listening socket with a queue of [`server::BACKLOG`] connections
/// that the kernel has completed and the server not yet accepted: a burst
/// of browsers (or a flood) waits there, bounded, costing the daemon no
/// descriptor until it is accepted. Address reuse as tokio's own `bind`
/// sets it, so a restart can bind at once.
fn listen(addr: SocketAddr) -> std::io::Result<TcpListener> {
    let socket = if addr.is_ipv4() {
        tokio::net::TcpSocket::new_v4()?
    } else {
        tokio::net::TcpSocket::new_v6()?
    };
    socket.set_reuseaddr(true)?;
    socket.bind(addr)?;
    socket.listen(server::BACKLOG)
}

/// Serves until `cancel` fires, then lets open connections finish for a
/// moment and returns.
pub async fn serve(listener: TcpListener, shared: Arc<Shared>, cancel: CancellationToken) {
    if let Ok(bound) = listener.local_addr() {
        let _ = shared.bound.set(bound);
    }
    // The limit is already raised by `bind`; raising again only reads it.
    let open_files = server::raise_open_file_limit();
    let limit = server::connection_limit(open_files, shared.config.devices.len());
    info!(
        "web: at most {limit} connections at once (open-file limit {}); a request's head must come within {} s, and a connection that moves nothing for {} s is closed",
        open_files.map_or("unknown".to_owned(), |n| n.to_string()),
        server::HEADER_TIMEOUT.as_secs(),
        server::STALL_TIMEOUT.as_secs()
    );
    server::serve(listener, router(shared), limit, cancel).await;
}

/// The routes, with the read-only guard around all of them.
pub fn router(shared: Arc<Shared>) -> Router {
    let guarded = Arc::clone(&shared);
    Router::new()
        .route("/", get(index))
        .route("/api/status", get(api_status))
        .route("/api/events", get(api_events))
        .route("/api/events/{id}", get(api_event))
        .route("/api/events/{id}/series", get(api_series))
        .route("/metrics", get(metrics_text))
        .route("/assets/leaktally.css", get(style))
        .route("/assets/refresh.js", get(script))
        .route("/assets/icon.svg", get(icon))
        .fallback(not_found)
        .with_state(shared)
        .layer(middleware::from_fn_with_state(guarded, read_only))
}

/// Refuses a foreign `Host` and every method but GET and HEAD, before
/// routing, and adds the headers every answer carries.
async fn read_only(State(shared): State<Arc<Shared>>, request: Request, next: Next) -> Response {
    let mut response = if let Err(refusal) = host_check(&shared, &request) {
        refusal
    } else if is_read(request.method()) {
        next.run(request).await
    } else {
        method_refused(request.method(), "this server")
    };
    with_common_headers(&mut response);
    response
}

/// Whether `method` only reads (GET or HEAD): all a read-only page answers.
pub(crate) fn is_read(method: &Method) -> bool {
    method == Method::GET || method == Method::HEAD
}

/// The refusal of a method that would change something, for `server`
/// ("this server", "the fleet view"), with the methods it does answer.
pub(crate) fn method_refused(method: &Method, server: &str) -> Response {
    let mut r = text(
        StatusCode::METHOD_NOT_ALLOWED,
        format!("{method} is not allowed: {server} is read-only and answers {ALLOW} only\n"),
    );
    r.headers_mut()
        .insert(header::ALLOW, HeaderValue::from_static(ALLOW));
    r
}

/// The headers every answer of a read-only page carries: no sniffing, no
/// referrer, and no caching unless the handler said otherwise.
pub(crate) fn with_common_headers(response: &mut Response) {
    let headers = response.headers_mut();
    headers.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    headers.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    headers
        .entry(header::CACHE_CONTROL)
        .or_insert(HeaderValue::from_static("no-store"));
}

/// The request's one host: its absolute URI's authority, which stands for
/// Host (RFC 9112, 3.2.2), else its Host header; `Err` with the refusal
/// when there is none, or more than one (RFC 9112, 3.2: whichever one a
/// check read, a proxy or the application might use the other).
#[allow(clippy::result_large_err)] // a refusal is the rare path
pub(crate) fn request_host(request: &Request) -> Result<String, Response> {
    if request.headers().get_all(header::HOST).iter().count() > 1 {
        return Err(text(
            StatusCode::BAD_REQUEST,
            "the request has more than one Host header; HTTP/1.1 allows one (RFC 9112, 3.2)\n"
                .into(),
        ));
    }
    let host = match request.uri().authority() {
        Some(authority) => Some(authority.as_str().to_owned()),
        None => request
            .headers()
            .get(header::HOST)
            .map(|v| String::from_utf8_lossy(v.as_bytes()).into_owned()),
    };
    host.ok_or_else(|| {
        text(
            StatusCode::BAD_REQUEST,
            "the request has no Host header; HTTP/1.1 requires one (RFC 9112, 3.2)\n".into(),
        )
    })
}

/// Answers `Err` with the refusal for a request whose `Host` does not name
/// this page (see the module doc).
#[allow(clippy::result_large_err)] // a refusal is the rare path
fn host_check(shared: &Shared, request: &Request) -> Result<(), Response> {
    let host = request_host(request)?;
    let local = request
        .extensions()
        .get::<server::ConnectedTo>()
        .map(|c| c.0);
    let listen = shared.listen();
    let extra = shared.config.web.as_ref().map_or(&[][..], |w| &w.hosts[..]);
    if host_allowed(&host, listen, local, extra) {
        return Ok(());
    }
    let shown = crate::logging::one_line(&host).into_owned();
    {
        let mut logged = shared
            .refused_hosts
            .lock()
            .unwrap_or_else(PoisonError::into_inner);
        if logged.len() < HOSTS_LOGGED && logged.insert(shown.clone()) {
            warn!(
                "web: refused a request for Host {shown:?}, which is not a name of this page (a DNS-rebinding page, or a name to add to [web] hosts){}",
                if logged.len() == HOSTS_LOGGED {
                    "; further foreign names are not logged"
                } else {
                    ""
                }
            );
        }
    }
    let mut names = vec![listen.to_string()];
    if listen.ip().is_loopback() {
        names.push(format!("localhost:{}", listen.port()));
    }
    names.extend(extra.iter().map(|h| match h.port {
        Some(p) => format!("{}:{p}", h.name),
        None => h.name.clone(),
    }));
    Err(text(
        StatusCode::MISDIRECTED_REQUEST,
        format!(
            "this page answers only for {}, not for {shown:?}; if you reach it through that name, add it to [web] hosts in the site config (see config/reference.toml)\n",
            names.join(", ")
        ),
    ))
}

/// Whether `host` (a `Host` header value) names the page served on
/// `listen`, reached on `local`, or is one of `extra`.
pub fn host_allowed(
    host: &str,
    listen: SocketAddr,
    local: Option<SocketAddr>,
    extra: &[HostName],
) -> bool {
    let Some((name, port)) = HostName::parse(host) else {
        return false;
    };
    // No port in Host means the scheme's default, 80 for http.
    let port = port.unwrap_or(80);
    if extra
        .iter()
        .any(|h| h.name == name && h.port.is_none_or(|p| p == port))
    {
        return true;
    }
    if port != listen.port() {
        return false;
    }
    let addresses: Vec<IpAddr> = [Some(listen.ip()), local.map(|l| l.ip())]
        .into_iter()
        .flatten()
        .filter(|a| !a.is_unspecified())
        .map(|a| a.to_canonical())
        .collect();
    match name.parse::<IpAddr>() {
        Ok(ip) => addresses.contains(&ip.to_canonical()),
        Err(_) => name == "localhost" && addresses.iter().any(IpAddr::is_loopback),
    }
}

/// Why a request could not be answered.
#[derive(Debug)]
enum Failure {
    BadRequest(String),
    NotFound(String),
    Unavailable(String),
}

impl From<StoreError> for Failure {
    fn from(e: StoreError) -> Self {
        Failure::Unavailable(e.to_string())
    }
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Unavailable(format!("{e:#}"))
    }
}

impl From<StatusError> for Failure {
    /// With every cause, as the status document's errors always said.
    fn from(e: StatusError) -> Self {
        anyhow::Error::from(e).into()
    }
}

impl Failure {
    fn status(&self) -> StatusCode {
        match self {
            Failure::BadRequest(_) => StatusCode::BAD_REQUEST,
            Failure::NotFound(_) => StatusCode::NOT_FOUND,
            Failure::Unavailable(_) => StatusCode::SERVICE_UNAVAILABLE,
        }
    }

    fn message(&self) -> &str {
        match self {
            Failure::BadRequest(m) | Failure::NotFound(m) | Failure::Unavailable(m) => m,
        }
    }

    fn log(&self) {
        if let Failure::Unavailable(m) = self {
            warn!("web: {m}");
        }
    }

    fn as_text(&self) -> Response {
        self.log();
        text(self.status(), format!("{}\n", self.message()))
    }

    fn as_json(&self) -> Response {
        self.log();
        /// Every JSON document the server sends carries its `format`.
        #[derive(Serialize)]
        struct Error<'a> {
            format: u32,
            error: &'a str,
        }
        json(
            self.status(),
            &Error {
                format: 1,
                error: self.message(),
            },
        )
    }
}

/// Runs a blocking database read on the blocking pool, within the read
/// bound.
async fn read<T, F>(shared: &Arc<Shared>, f: F) -> Result<T, Failure>
where
    T: Send + 'static,
    F: FnOnce(&Shared) -> Result<T, Failure> + Send + 'static,
{
    let _permit = tokio::time::timeout(READ_QUEUE, shared.readers.acquire())
        .await
        .map_err(|_| Failure::Unavailable("the server is busy; try again in a moment".into()))?
        .map_err(|_| Failure::Unavailable("the server is stopping".into()))?;
    let shared = Arc::clone(shared);
    tokio::task::spawn_blocking(move || f(&shared))
        .await
        .map_err(|e| Failure::Unavailable(format!("a database read failed: {e}")))?
}

pub(crate) fn text(status: StatusCode, body: String) -> Response {
    (
        status,
        [(header::CONTENT_TYPE, "text/plain; charset=utf-8")],
        body,
    )
        .into_response()
}

pub(crate) fn json<T: Serialize>(status: StatusCode, value: &T) -> Response {
    match serde_json::to_string_pretty(value) {
        Ok(mut body) => {
            body.push('\n');
            (status, [(header::CONTENT_TYPE, "application/json")], body).into_response()
        }
        Err(e) => text(
            StatusCode::INTERNAL_SERVER_ERROR,
            format!("cannot write JSON: {e}\n"),
        ),
    }
}

/// An event id from the path; anything but a number names no event.
fn event_id(id: &str) -> Result<i64, Failure> {
    id.parse()
        .map_err(|_| Failure::NotFound(format!("there is no event {id:?}; ids are numbers")))
}

/// The event row, or 404.
fn find_event(conn: &rusqlite::Connection, id: i64) -> Result<store::EventRow, Failure> {
    store::event(conn, id)?.ok_or_else(|| {
        Failure::NotFound(format!(
            "there is no event {id}; /api/events lists every event"
        ))
    })
}

async fn index(State(shared): State<Arc<Shared>>) -> Response {
    match read(&shared, page_data).await {
        Ok(data) => (
            StatusCode::OK,
            [
                (header::CONTENT_TYPE, "text/html; charset=utf-8"),
                (header::CONTENT_SECURITY_POLICY, PAGE_POLICY),
            ],
            page::render(&data),
        )
            .into_response(),
        Err(f) => f.as_text(),
    }
}

/// Everything the page shows, read in one go through one connection.
fn page_data(shared: &Shared) -> Result<page::PageData, Failure> {
    let conn = open_for_document(shared)?;
    let presentation = Presentation::of(&shared.config);
    let doc = status::document(&conn, None, &presentation)?;
    let mut events = Vec::with_capacity(doc.events.len());
    for e in &doc.events {
        let series = chart::thin(
            chart::points(&store::released_series(&conn, e.event, e.revision)?),
            chart::MAX_POINTS,
        );
        let notes = page::notes(&store::actions_of(&conn, e.event)?);
        let tank = shared.config.tanks.iter().find(|t| t.id == e.tank);
        events.push(page::EventExtras {
            series,
            notes,
            description: tank.map(|t| t.description.clone()).unwrap_or_default(),
            substance: tank.map(|t| t.substance.clone()).unwrap_or_default(),
        });
    }
    let closed =
        status::history::history(&conn, &recently_closed(doc.generated_at_ms), &presentation)?;
    let stale_after_ms = status::stale_after_ms(&shared.config);
    Ok(page::PageData {
        site: shared.config.site_name.clone(),
        doc,
        events,
        closed: closed.events,
        stale_after_ms,
        store: shared.health.snapshot(),
        losses: suspected(shared),
        outbox: shared.outbox.snapshot(),
        broker: shared
            .config
            .mqtt
            .as_ref()
            .map(|m| format!("{}:{}", m.host, m.port)),
    })
}

/// The suspected losses standing, each with its tank's density.
fn suspected(shared: &Shared) -> Vec<page::Suspected> {
    shared
        .losses
        .snapshot()
        .into_iter()
        .filter_map(|standing| {
            let tank = shared.config.tanks.iter().find(|t| t.id == standing.tank)?;
            Some(page::Suspected {
                density: tank.vessel.density(),
                standing,
            })
        })
        .collect()
}

/// The closed events the page lists: the last [`page::CLOSED_SHOWN`]
/// closed within [`page::CLOSED_WITHIN_MS`] of `now_ms`.
fn recently_closed(now_ms: i64) -> EventFilter {
    EventFilter {
        open: Some(false),
        since_ms: Some(now_ms - page::CLOSED_WITHIN_MS),
        limit: Some(page::CLOSED_SHOWN),
        ..EventFilter::default()
    }
}

/// The read-only connection a request reads the status document (and
/// anything else it shows) through; a failure to open it is said with every
/// cause, as the document's own errors are.
fn open_for_document(shared: &Shared) -> Result<rusqlite::Connection, Failure> {
    store::open_read_only(&shared.db).map_err(|e| anyhow::Error::from(e).into())
}

async fn api_status(State(shared): State<Arc<Shared>>) -> Response {
    let doc = read(&shared, |s| {
        Ok(status::document(
            &open_for_document(s)?,
            None,
            &Presentation::of(&s.config),
        )?)
    });
    match doc.await {
        Ok(doc) => json(StatusCode::OK, &doc),
        Err(f) => f.as_json(),
    }
}

/// The filter `/api/events` takes from its query: `tank=TAG`,
/// `state=open|closed` and `limit=N`. Anything else is refused, so a typo
/// is not silently ignored. (Parsed here: axum's query extractor is a
/// feature the build leaves out, and three keys need no crate.)
fn events_filter(query: Option<&str>) -> Result<EventFilter, Failure> {
    let usage = "/api/events takes tank=TAG, state=open|closed and limit=N";
    let mut filter = EventFilter::default();
    for pair in query.unwrap_or("").split('&').filter(|p| !p.is_empty()) {
        let (key, value) = pair.split_once('=').unwrap_or((pair, ""));
        let value = percent_decoded(value).ok_or_else(|| {
            Failure::BadRequest(format!("{key}: not valid percent-encoded UTF-8; {usage}"))
        })?;
        match key {
            "tank" => filter.tank = Some(value),
            "state" => {
                filter.open = match value.as_str() {
                    "open" => Some(true),
                    "closed" => Some(false),
                    other => {
                        return Err(Failure::BadRequest(format!(
                            "state={other:?} is not a state; {usage}"
                        )));
                    }
                }
            }
            "limit" => {
                filter.limit = Some(value.parse().map_err(|_| {
                    Failure::BadRequest(format!("limit={value:?} is not a count; {usage}"))
                })?)
            }
            other => {
                return Err(Failure::BadRequest(format!(
                    "{other:?} is not a filter; {usage}"
                )));
            }
        }
    }
    Ok(filter)
}

/// A query value with its `%XX` escapes and `+` (a space, in a form's
/// query) decoded; `None` for a bad escape or text that is not UTF-8.
fn percent_decoded(value: &str) -> Option<String> {
    let bytes = value.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        match bytes[i] {
            b'%' => {
                let hex = std::str::from_utf8(bytes.get(i + 1..i + 3)?).ok()?;
                out.push(u8::from_str_radix(hex, 16).ok()?);
                i += 3;
            }
            b'+' => {
                out.push(b' ');
                i += 1;
            }
            b => {
                out.push(b);
                i += 1;
            }
        }
    }
    String::from_utf8(out).ok()
}

async fn api_events(State(shared): State<Arc<Shared>>, uri: Uri) -> Response {
    let filter = match events_filter(uri.query()) {
        Ok(f) => f,
        Err(f) => return f.as_json(),
    };
    let found = read(&shared, move |s| {
        let conn = open_for_document(s)?;
        Ok(status::history::history(
            &conn,
            &filter,
            &Presentation::of(&s.config),
        )?)
    })
    .await;
    match found {
        Ok(doc) => json(StatusCode::OK, &doc),
        Err(f) => f.as_json(),
    }
}

async fn api_event(State(shared): State<Arc<Shared>>, UrlPath(id): UrlPath<String>) -> Response {
    let found = read(&shared, move |s| {
        let id = event_id(&id)?;
        let conn = store::open_read_only(&s.db)?;
        find_event(&conn, id)?;
        Ok(status::document(
            &conn,
            Some(id),
            &Presentation::of(&s.config),
        )?)
    })
    .await;
    match found {
        Ok(doc) => json(StatusCode::OK, &doc),
        Err(f) => f.as_json(),
    }
}

async fn api_series(State(shared): State<Arc<Shared>>, UrlPath(id): UrlPath<String>) -> Response {
    let found = read(&shared, move |s| {
        let id = event_id(&id)?;
        let conn = store::open_read_only(&s.db)?;
        let row = find_event(&conn, id)?;
        let all = chart::points(&store::released_series(&conn, id, row.revision)?);
        Ok(chart::Series::new(&row, all))
    })
    .await;
    match found {
        Ok(series) => json(StatusCode::OK, &series),
        Err(f) => f.as_json(),
    }
}

async fn metrics_text(State(shared): State<Arc<Shared>>) -> Response {
    let doc = read(&shared, |s| {
        Ok(status::document(
            &open_for_document(s)?,
            None,
            &Presentation::of(&s.config),
        )?)
    })
    .await;
    match doc {
        Ok(doc) => {
            let body = metrics::render(&metrics::Inputs {
                config: &shared.config,
                devices: &shared.stats.devices(),
                tanks: &shared.stats.tanks(),
                doc: &doc,
                store: &shared.health.snapshot(),
                outbox: &shared.outbox.snapshot(),
                losses: &shared.losses.snapshot(),
                losses_raised: shared.losses.raised_total(),
                started_ms: shared.started_ms,
            });
            (
                StatusCode::OK,
                [(header::CONTENT_TYPE, METRICS_CONTENT_TYPE)],
                body,
            )
                .into_response()
        }
        Err(f) => f.as_text(),
    }
}

pub(crate) async fn style() -> Response {
    asset("text/css; charset=utf-8", STYLE)
}

pub(crate) async fn script() -> Response {
    asset("text/javascript; charset=utf-8", SCRIPT)
}

pub(crate) async fn icon() -> Response {
    asset("image/svg+xml", ICON)
}

/// A file built into the binary: it changes only with the binary, so a
/// browser may keep it for a few minutes.
fn asset(content_type: &'static str, body: &'static str) -> Response {
    (
        StatusCode::OK,
        [
            (header::CONTENT_TYPE, content_type),
            (header::CACHE_CONTROL, "max-age=300"),
        ],
        Body::from(body),
    )
        .into_response()
}

async fn not_found(request: Request) -> Response {
    text(
        StatusCode::NOT_FOUND,
        format!(
            "nothing at {}; try / (the page), /api/status, /api/events, /api/events/ID, /api/events/ID/series or /metrics\n",
            request.uri().path()
        ),
    )
}

#[cfg(test)]
mod tests;
